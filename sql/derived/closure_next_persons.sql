-- One round of the version closure (pipeline/warehouse/versions.py): the persons not yet in the
-- closure (closure_persons) with a version under a specimen key (source + specimen + analyte) of
-- a version of the persons just added (closure_new_persons, whose versions are in
-- closure_found). closure_all holds every version. All four are given by the caller.
with specimens as (
    select distinct f.source_id, f.specimen_id, f.analyte
    from closure_found as f semi join closure_new_persons as n on n.person_key = f.person_key
    where f.specimen_id is not null
)
select distinct v.person_key from closure_all as v
where (v.source_id, v.specimen_id, v.analyte) in (select * from specimens)
  and v.person_key not in (select person_key from closure_persons)
