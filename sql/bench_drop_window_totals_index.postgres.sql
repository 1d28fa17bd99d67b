-- Benchmark only (tests/benchmarks/bench_window_index.py): the results schema without migration 8's
-- index, to time the running window's reads and deletes before it.
drop index if exists {{ schema }}.bidder_window_totals_by_bidder
