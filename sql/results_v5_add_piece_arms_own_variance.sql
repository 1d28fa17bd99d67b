-- Schema version 5: a what-if layout's CR0 variance with itself as the mixture on the stratum's
-- bids (the effective share's numerator); null on other rows.
alter table {{ schema }}.stratum_piece_arms add column own_variance double
