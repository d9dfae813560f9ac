-- The results whose accepted set a run settling a touched scope can change: its own versions
-- (new_versions) and the stored ones whose outcome it changes (result_versions against
-- result_versions_resolved). The measure stage recomputes only around them
-- (pipeline/stages/measure.py, update_touched); new_versions is given by the caller.
with changed as (
    select person_key, source_id, specimen_id, collected_date from new_versions
    union
    select v.person_key, v.source_id, v.specimen_id, v.collected_date
    from result_versions as v
    join result_versions_resolved as r on r.file_id = v.file_id and r.line_no = v.line_no
    where v.outcome is distinct from r.outcome
)
select * from changed
