-- Columns this version writes that an existing results table lacks (a file created by an older
-- version): the writer refuses such a file rather than fail half-way through an insert.
with expected as (
    select *
    from (values
        ('arm_estimates', 'confidence_level'),
        ('arm_estimates', 'cluster'),
        ('arm_estimates', 'payment_rule'),
        ('arm_estimates', 'floor'),
        ('arm_estimates_to_date', 'confidence_level'),
        ('arm_estimates_to_date', 'cluster'),
        ('arm_estimates_to_date', 'payment_rule'),
        ('arm_estimates_to_date', 'floor'),
        ('arm_estimates_to_date', 'days_used'),
        ('arm_estimates_to_date', 'days_left_out'),
        ('arm_estimates_to_date', 'n_days_used'),
        ('arm_estimates_to_date', 'n_days_left_out')
    ) as t (table_name, column_name)
),

present as (
    select table_name, column_name
    from information_schema.columns
    where table_schema = $schema
)

select expected.table_name, expected.column_name
from expected
anti join present using (table_name, column_name)
order by expected.table_name, expected.column_name
