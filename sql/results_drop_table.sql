-- A migration step: drop a table that the step has copied into its successor.
drop table {{ schema }}.{{ table }}
