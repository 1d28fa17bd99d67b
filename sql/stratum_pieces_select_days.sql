-- Days before $ds with stored stratum pieces of one experiment (candidates of the analysis window).
select distinct ds
from {{ schema }}.stratum_pieces
where experiment_id = $experiment_id
    and ds < $ds
order by ds
