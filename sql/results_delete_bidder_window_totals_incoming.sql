-- First half of a day's update of the running totals: drop the rows of today's bidders (those of
-- the registered relation `incoming`), which the insert then writes again with today added.
delete from {{ schema }}.bidder_window_totals
where experiment_id = $experiment_id
    and bidder_id in (select i.bidder_id from incoming as i)
