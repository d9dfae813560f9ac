-- The seed of the link stage's changed persons: the versions ingested since the snapshot
-- ($max_file_id) or reported between the snapshot's period end and this one.
select person_key, source_id, specimen_id, analyte from result_versions
where file_id > $max_file_id or (reported_date > $snap_end and reported_date <= $period_end)
