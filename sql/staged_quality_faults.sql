-- Rows of a staged bids file whose quality factor is missing or not a positive finite number, and
-- the first of them (its 0-based row in the file and its auction) for the error message.
with source as (
    select
        file_row_number as row_number,
        auction_id,
        cast(quality as double) as quality
    from read_parquet($path, file_row_number = true)
),

faults as (
    select row_number, auction_id, quality
    from source
    where quality is null or isnan(quality) or isinf(quality) or quality <= 0
)

select
    count(*) as n_faults,
    min(row_number) as first_row,
    arg_min(cast(auction_id as varchar), row_number) as first_auction,
    arg_min(cast(quality as varchar), row_number) as first_quality
from faults
