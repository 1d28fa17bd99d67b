-- The running window's integer key of every id of the registered relation `ids` (column `bidder_id`,
-- text), in its order: 63 bits of the id's md5 (its first 16 hex digits as an unsigned 64-bit
-- number, shifted right once), the key `results_insert_bidder_window_totals.sql` stores and the
-- window's lookup and delete match on. The daily update splits today's bidders by its top bits.
select ((('0x' || left(md5(bidder_id), 16))::ubigint) >> 1)::bigint as bidder_key
from ids
