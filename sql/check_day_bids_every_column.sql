-- The day's bids with every column of the log: what the statistical checks read when the experiment
-- declares scale covariates or segments (columns of the log the spec names; the checks homogenise
-- the bids by the covariates and strata by the segments). Types as logged: the checks' bid preparation reads decimals and narrow integers itself.
select *
from {{ relation }}
