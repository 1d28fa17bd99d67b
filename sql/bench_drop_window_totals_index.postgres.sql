-- Benchmark only (tests/benchmarks/bench_window_index.py): the results schema without its index on
-- the running bidder totals (migration 10's, by experiment and bidder key), to time the running
-- window's reads and deletes without it.
drop index if exists {{ schema }}.bidder_window_totals_by_key
