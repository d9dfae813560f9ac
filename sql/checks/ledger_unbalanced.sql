-- The files whose rows read differ from the sum of their outcomes (the ledger must balance:
-- rows_read = accepted + rejected + superseded + duplicate + withdrawn + pending). Empty when
-- every row is accounted for; the validate stage stops the run otherwise.
select file_path, rows_read,
       rows_accepted + rows_rejected + rows_superseded + rows_duplicate
       + rows_withdrawn + rows_pending as accounted
from ingest_files
where status in ('ingested', 'duplicate_file')
  and rows_read <> rows_accepted + rows_rejected + rows_superseded + rows_duplicate
                   + rows_withdrawn + rows_pending
order by file_id
