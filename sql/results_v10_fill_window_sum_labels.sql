-- Schema version 10: a version-9 window's label order is the one results_v10_copy_bidder_window_totals
-- gave its totals (the labels' names in byte order), read off its version-9 rows before they go.
update {{ schema }}.bidder_window as w
set sum_labels = (
    select string_agg(labels.arm, ',' order by labels.arm)
    from (
        select distinct t.arm
        from {{ schema }}.bidder_window_totals as t
        where t.experiment_id = w.experiment_id
    ) as labels
)
