-- Benchmark only (tests/benchmarks/bench_window_lookup.py): rewrite the stored running totals in the
-- order daily inserts in key-range bucket order leave them: each run of `$rows_per_day` rows (one
-- day's insert) sorted by the top `$bits` bits of the integer key, the runs in their stored order.
create or replace table {{ schema }}.bidder_window_totals as
select * from {{ schema }}.bidder_window_totals
order by rowid // $rows_per_day, bidder_key >> (63 - $bits)
