-- Schema version 7: the stratum key of a piece's bidder sums gains the segment label (null: the
-- experiment declares no segments). No key on this table (see results_create_stratum_piece_bidder_sums).
alter table {{ schema }}.stratum_piece_bidder_sums add column segment varchar
