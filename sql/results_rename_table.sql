-- A migration step: give a rebuilt table its final name.
alter table {{ schema }}.{{ table }} rename to {{ new_name }}
