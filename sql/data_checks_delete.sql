-- Remove the check outcomes of one (experiment, day) before writing the new ones.
delete from {{ schema }}.data_checks
where experiment_id = $experiment_id
    and ds = $ds
