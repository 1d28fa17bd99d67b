-- Schema version 10: the running window records the order of the revenue labels in its totals'
-- list column (comma-joined; null when it holds no totals).
alter table {{ schema }}.bidder_window add column sum_labels varchar
