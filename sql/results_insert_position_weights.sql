-- Second half of the replace: insert the registered relation `incoming`, one row per key.
insert into {{ schema }}.arm_position_weights (
    experiment_id, ds, arm, position, weight, source, impressions, clicks, first_click_ds, run_id, computed_at
)
select
    experiment_id, ds, arm, position, weight, source, impressions, clicks, first_click_ds,
    run_id, computed_at
from incoming
where experiment_id = $experiment_id
    and ds = $ds
qualify row_number() over (partition by experiment_id, ds, arm, position order by computed_at desc) = 1
