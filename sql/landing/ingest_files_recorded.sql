-- ingest_files_recorded: the files the ledger already holds (ingested, or recorded as a copy of
-- one), in the order they were recorded; the inbox scan (pipeline/stages/ingest/inbox.py) marks
-- a file already ingested, or a duplicate of the first file ingested with the same content, and
-- takes a file's hash from file_stat when the file's status is unchanged since it was hashed.
select source_id, sha256, file_path, status, file_stat
from ingest_files
where status in ('ingested', 'duplicate_file')
order by file_id
