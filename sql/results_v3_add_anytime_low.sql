-- Schema version 3: the experiment-to-date rows carry anytime-valid bounds beside the fixed
-- interval. Lower bound: estimate - std_error x the normal-mixture multiplier at the look's
-- auctions to date over anytime_horizon_auctions (docs/method.md, "Looking every day"); null for
-- welfare (no interval) and for rows written before version 3.
alter table {{ schema }}.arm_estimates_to_date add column anytime_low double
