"""Ingest: find what is new in the inbox, read it into landed rows, record every file in the ledger.

One reader per layout (delimited text, FHIR NDJSON, Parquet) turns a lab's file into the same
landed columns (all text, as reported), with the file's line number and the raw line (the person
token masked) kept for every row. A delimited file without quotes is split in bulk (polars), any
other goes through the csv module; both give the same rows. Each file's rows are keyed and
handed to the run's sink (the validate stage's judge) as soon as it is read, so one file at a
time is held in memory and the run's rows are never stored unjudged. A fault that concerns the
whole file (not UTF-8, a missing column, the wrong delimiter, a truncated or corrupt Parquet
file) holds that file back with a message naming it; the other
files go on, and so does a file that cannot be read at all (permission denied, an I/O error).
Before anything is stored, every file passes the identifier screen (:mod:`pipeline.core.identifiers`):
a file whose columns or sampled values look like direct identifiers is held back the same way,
unless the source config allows the column with a written reason (recorded in the ledger
message, hence in the run manifest). Nothing here judges a value: that is the validate stage.
"""
