-- rejected_rows_replaced: the rejected rows a reprocess replaced, with the reprocess id.
create table if not exists rejected_rows_replaced as
select cast(null as varchar) as reprocess_id, *
from rejected_rows
limit 0;
