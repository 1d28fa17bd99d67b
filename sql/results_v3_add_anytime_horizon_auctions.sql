-- Schema version 3: the auctions at the planned last look that the anytime-valid bounds are tuned
-- for (planned days x the mean auctions per day used to date); null for rows written before version 3.
alter table {{ schema }}.arm_estimates_to_date add column anytime_horizon_auctions bigint
