-- Per source, this run's judged rows and those with an unmapped code value in one of $fields
-- (the gated fields: sex and unit). judged_rows and judged_unmapped are given by the caller
-- (results_validated and unmapped_code_values of the run; pipeline/stages/validate.py).
with per_source as (
    select r.source_id, r.n, coalesce(u.unmapped, 0) as unmapped
    from (select source_id, count(*) as n from judged_rows group by source_id) as r
    left join (select source_id, sum(rows) as unmapped from judged_unmapped
               where field in (select unnest($fields::varchar[])) group by source_id) as u
        on u.source_id = r.source_id
)
select * from per_source order by source_id
