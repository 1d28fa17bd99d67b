-- Column names and DuckDB types of the day's bids relation (the contract's schema check).
select
    column_name,
    column_type
from (describe select * from {{ relation }})
