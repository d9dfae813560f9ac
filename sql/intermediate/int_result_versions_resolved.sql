-- int_result_versions_resolved: one row per version in scope (the view versions_in_scope: every
-- row of result_versions, or in a monthly run only those that its new rows can change; see
-- pipeline/validate.py, settle_scope) reported by $as_of, with its outcome as known on that day. The validate stage runs it with no limit ($as_of far in the
-- future: today's outcomes, stored in result_versions.outcome); the link stage runs it with the
-- period end, so a past period is rebuilt as it was known then (an amendment or cancellation
-- reported later does not reach back).
-- Rules (DEVELOPERS.md, "Statuses and duplicates"):
--   * a row identical to an earlier row of the same source (same person, specimen, analyte, date,
--     status, value and unit) is a duplicate, whichever file it came in;
--   * the other rows of one result (same source + specimen + analyte; without a specimen id,
--     same source + person + collection date + analyte) are its versions: the latest report wins
--     (report date, then file order, then line);
--   * the winner is accepted when final, amended or corrected; withdrawn when cancelled or
--     entered-in-error; pending when preliminary (it waits for its final);
--   * every earlier version is superseded: kept as history, never counted;
--   * the same result arriving from two sources (a lab that forwards another lab's result, or
--     sends it on behalf of a hospital): an accepted result with the same person, analyte,
--     collection date, comparator and canonical value (to 4 decimals) as an accepted result of
--     ANOTHER source is a duplicate; the one reported first is kept (then the source id, file
--     and line decide), so the counts do not depend on which lab's file arrived first.
with copies as (
    select
        v.file_id,
        v.line_no,
        v.status,
        v.reported_date,
        coalesce(
            v.source_id || '|s|' || v.specimen_id || '|' || v.analyte,
            v.source_id || '|p|' || v.person_key || '|' || v.collected_date::varchar || '|' || v.analyte
        ) as version_key,
        row_number() over (
            partition by v.source_id, v.person_key, v.specimen_id, v.analyte, v.collected_date,
                         v.status, v.value_text, v.reported_unit
            order by v.file_id, v.line_no
        ) as copy_number
    from versions_in_scope as v
    where v.reported_date <= $as_of
),
versions as (
    select
        c.*,
        row_number() over (
            partition by c.version_key
            order by c.reported_date desc, c.file_id desc, c.line_no desc
        ) as recency
    from copies as c
    where c.copy_number = 1
),
within_source as (
    select
        c.file_id,
        c.line_no,
        case
            when c.copy_number > 1 then 'duplicate'
            when v.recency > 1 then 'superseded'
            when c.status in ('final', 'amended', 'corrected') then 'accepted'
            when c.status in ('cancelled', 'entered-in-error') then 'withdrawn'
            when c.status = 'preliminary' then 'pending'
        end as outcome
    from copies as c
    left join versions as v on v.file_id = c.file_id and v.line_no = c.line_no
),
across_sources as (
    select
        r.file_id,
        r.line_no,
        r.source_id,
        first_value(r.source_id) over same_result as kept_source
    from (
        select w.file_id, w.line_no, x.source_id, x.person_key, x.analyte, x.collected_date,
               x.comparator, round(x.value, 4) as value_key, x.reported_date
        from within_source as w
        join versions_in_scope as x on x.file_id = w.file_id and x.line_no = w.line_no
        where w.outcome = 'accepted' and x.value is not null
    ) as r
    window same_result as (
        partition by r.person_key, r.analyte, r.collected_date, r.comparator, r.value_key
        order by r.reported_date, r.source_id, r.file_id, r.line_no
    )
)
select
    w.file_id,
    w.line_no,
    case when a.source_id <> a.kept_source then 'duplicate' else w.outcome end as outcome
from within_source as w
left join across_sources as a on a.file_id = w.file_id and a.line_no = w.line_no
