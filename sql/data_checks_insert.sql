-- One check outcome of one (experiment, day).
insert into {{ schema }}.data_checks (
    experiment_id, ds, "check", severity, passed, observed, threshold, details, run_id, checked_at
)
values (
    $experiment_id, $ds, $check, $severity, $passed, $observed, $threshold, $details, $run_id, $checked_at
)
