-- Rows of a staged bids file (or a glob of the day's shard files) whose quality factor is missing or
-- not a positive finite number, and the first of them (its file, its 0-based row in that file and its
-- auction) for the error message. Rows are numbered within their file, so the file is named with them.
with source as (
    select
        filename as file_name,
        file_row_number as row_number,
        auction_id,
        cast(quality as double) as quality
    from read_parquet($path, file_row_number = true, filename = true)
),

faults as (
    -- first by file, then by row within the file
    select
        struct_pack(f := file_name, r := row_number) as row_key,
        file_name,
        row_number,
        auction_id,
        quality
    from source
    where quality is null or isnan(quality) or isinf(quality) or quality <= 0
)

select
    count(*) as n_faults,
    arg_min(file_name, row_key) as first_file,
    arg_min(row_number, row_key) as first_row,
    arg_min(cast(auction_id as varchar), row_key) as first_auction,
    arg_min(cast(quality as varchar), row_key) as first_quality
from faults
