-- sources check: rejected rows of the one checked file per reason, with the first ten lines and
-- their messages; the most frequent reason first.
select reason_code, count(*), list([line_no::varchar, message] order by line_no)[1:10]
from rejected_rows group by reason_code order by count(*) desc, reason_code
