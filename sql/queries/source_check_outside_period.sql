-- sources check: accepted rows of the one checked file collected or reported after $end, and the
-- first ten of their line numbers.
select count(*), coalesce(list(line_no order by line_no)[1:10], [])
from result_versions
where outcome = 'accepted' and (collected_date > $end or reported_date > $end)
