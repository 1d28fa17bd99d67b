-- Schema version 5: a row may be a layout that did not run, estimated from the mixture's bids
-- (docs/method.md, "Layouts that did not run"); null for rows written before version 5 (arms).
alter table {{ schema }}.arm_estimates add column what_if boolean
