-- Position weights used on the latest day of one experiment (spec or measured).
select arm, position, weight, source, impressions, clicks, first_click_ds, ds
from {{ schema }}.arm_position_weights
where experiment_id = $experiment_id
qualify ds = max(ds) over ()
order by arm, position
