-- Schema version 3: upper anytime-valid bound of an experiment-to-date row (see
-- results_v3_add_anytime_low); null for welfare and for rows written before version 3.
alter table {{ schema }}.arm_estimates_to_date add column anytime_high double
