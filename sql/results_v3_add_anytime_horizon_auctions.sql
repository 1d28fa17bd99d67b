-- Schema version 3: the auctions at the planned last look that the anytime-valid bounds are tuned
-- for (planned days x auctions of the first day used); null for rows written before version 3.
alter table {{ schema }}.arm_estimates_to_date add column anytime_horizon_auctions bigint
