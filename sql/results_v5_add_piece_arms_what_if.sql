-- Schema version 5: stored stratum pieces carry what-if layouts after the arms (0 auctions, no
-- realized sums); null for rows written before version 5 (arms and the mixture).
alter table {{ schema }}.stratum_piece_arms add column what_if boolean
