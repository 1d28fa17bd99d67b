-- First half of a day's update of the running totals: drop the rows of today's (segment, bidder)
-- pairs (those of the registered relation `incoming`; segment null: pooled), matched on the integer
-- bidder key, which the insert then writes again with today added.
-- A join on today's distinct keys (`using`), not a correlated `exists`: DuckDB then hashes today's
-- keys once and probes with the stored key column (12-day window of 9M stored bidders, 440k of
-- today's found: 0.9-1.1 CPU s and +250 MiB, against 3.9-4.2 CPU s and +800 MiB for `exists`).
delete from {{ schema }}.bidder_window_totals as t
using (
    select distinct
        segment,
        ((('0x' || left(md5(bidder_id), 16))::ubigint) >> 1)::bigint as bidder_key
    from incoming
) as i
where t.experiment_id = $experiment_id
    and t.bidder_key = i.bidder_key
    and t.segment is not distinct from i.segment
