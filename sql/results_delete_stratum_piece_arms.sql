-- First half of the idempotent replace of one (experiment, day): drop its previous rows.
delete from {{ schema }}.stratum_piece_arms
where experiment_id = $experiment_id
    and ds = $ds
