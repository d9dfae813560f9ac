-- The quality gate's batch cells (pipeline/stages/quality_gate.py): one row per source x analyte
-- x unit x status x sex of the run's well-formed rows, in one scan. batch_rows (those rows, each
-- standard column in its type: a typed null where it is missing, a TRY_CAST where its type is
-- wrong) is given by the caller; $withdrawn: the statuses that withdraw a result.
-- NaN counts as no value (nullif: DuckDB sorts NaN above every number, so it would otherwise hide
-- in the greatest value); the status is a key of the cell, so withdrawn cells are told apart
-- after the aggregation, where the plausible range is joined on too.
with g as (
    select source_id, analyte, unit, status, sex, count(*) as rows,
           min(nullif(value, 'nan'::double)) as least,
           max(nullif(value, 'nan'::double)) as greatest,
           count(nullif(value, 'nan'::double)) as numbers,
           count(*) - count(person_key) as null_person_key,
           count(*) - count(collected_date) as null_collected_date,
           count(*) - count(analyte) as null_analyte,
           count(*) - count(source_id) as null_source_id,
           count(*) - count(file_id) as null_file_id,
           count(*) - count(line_no) as null_line_no
    from batch_rows
    group by 1, 2, 3, 4, 5
),
cells as (
    select g.*, coalesce(g.status, '') in (select unnest($withdrawn::varchar[])) as withdrawn
    from g
)
select g.source_id,
       coalesce(g.analyte, '(none)') || ' [' || coalesce(g.unit, '(none)') || ']' as analyte_unit,
       g.analyte, g.unit, g.status, g.sex, g.rows,
       case when g.withdrawn then null else g.least end as value_min,
       case when g.withdrawn then null else g.greatest end as value_max,
       case when g.withdrawn then null else r.min_value end as range_min,
       case when g.withdrawn then null else r.max_value end as range_max,
       -- an ordinal result (a dipstick reading) carries a reading, not a number
       case when g.withdrawn or a.result_type = 'ordinal' then 0
            else g.rows - g.numbers end as missing_value,
       g.null_person_key, g.null_collected_date, g.null_analyte, g.null_source_id,
       g.null_file_id, g.null_line_no
from cells as g
left join reference.ranges as r on r.analyte = g.analyte
left join reference.analytes as a on a.analyte = g.analyte
order by 1, 2, 3, 4, 5, 6
