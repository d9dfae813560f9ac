-- ingest_files_recorded: the files the ledger already holds (ingested, or recorded as a copy of
-- one), in the order they were recorded; the inbox scan (pipeline/stages/ingest/inbox.py) marks
-- a file already ingested, or a duplicate of the first file ingested with the same content.
select source_id, sha256, file_path, status
from ingest_files
where status in ('ingested', 'duplicate_file')
order by file_id
