-- The day's bids in the columns the statistical checks read, and every other column of the log (an
-- experiment's segment columns among them: the checks strata by number of bidders and segment).
select
    * replace (
        cast(bid as double) as bid,  -- any numeric type of the contract (decimals too)
        cast(quality as double) as quality  -- 1 when the log has none (check_unit_quality.sql)
    )
from {{ relation }}
