-- Schema version 5: a what-if layout's effective share (its own-mixture variance over its
-- variance, docs/method.md); null on arm rows and on rows written before version 5.
alter table {{ schema }}.arm_estimates add column effective_share double
