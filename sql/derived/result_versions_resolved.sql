-- result_versions_resolved: one row per version in scope (the view versions_in_scope: every
-- row of result_versions, or in a monthly run only those that its new rows can change; see
-- pipeline/stages/validate.py, settle_scope) reported by $as_of, with its outcome as known on that day. The validate stage runs it with no limit ($as_of far in the
-- future: today's outcomes, stored in result_versions.outcome); the link stage runs it with the
-- period end, so a past period is rebuilt as it was known then (an amendment or cancellation
-- reported later does not reach back).
-- Rules (DEVELOPERS.md, "Statuses and duplicates"):
--   * a row identical to an earlier row of the same source (same person, specimen, analyte, date,
--     status, value and unit) is a duplicate, whichever file it came in;
--   * a specimen id seen under two persons (same source + specimen + analyte, two person keys)
--     is a conflict: every row of it is rejected (kept out, with the reason specimen_conflict),
--     since which person the result belongs to is not certain;
--   * the other rows of one result (same source + person + specimen + analyte; without a
--     specimen id, same source + person + collection date + analyte) are its versions: the
--     latest report wins (report date; at the same report date an amended or corrected version
--     wins over a final one; then file order, then line);
--   * the winner is accepted when final, amended or corrected; withdrawn when cancelled or
--     entered-in-error; pending when preliminary (it waits for its final);
--   * every earlier version is superseded: kept as history, never counted;
--   * the same result arriving from two sources (a lab that forwards another lab's result, or
--     sends it on behalf of a hospital): an accepted result with the same person, analyte,
--     collection date, comparator and canonical value (to 4 decimals) as an accepted result of
--     ANOTHER source is a duplicate; the one reported first is kept (then the source id, file
--     and line decide), so the counts do not depend on which lab's file arrived first.
-- How: each rule ranks rows within a group (same copy, same result, same result from several
-- sources), but almost every group has one row. A hash of each group's columns is counted first
-- and only the rows whose hash occurs more than once are ranked, by the exact columns read back
-- from versions_in_scope; the others are first in their group by definition. Two different
-- groups that share a hash are still ranked apart, so a collision costs time, never a wrong
-- outcome. The CTEs carry hashes, not the text columns, so that what DuckDB keeps is narrow.
with conflicted as (
    -- a specimen id under more than one person (min and max differ: cheaper than a distinct count)
    select source_id, specimen_id, analyte
    from versions_in_scope
    where specimen_id is not null and reported_date <= $as_of
    group by source_id, specimen_id, analyte
    having min(person_key) <> max(person_key)
),
in_conflict as (
    select v.file_id, v.line_no
    from versions_in_scope as v
    semi join conflicted as c
        on c.source_id = v.source_id and c.specimen_id = v.specimen_id and c.analyte = v.analyte
    where v.reported_date <= $as_of
),
keyed as not materialized (
    select
        v.file_id,
        v.line_no,
        v.status,
        v.reported_date,
        hash(v.source_id, v.person_key, v.specimen_id, v.analyte, v.collected_date,
             v.status, v.value_text, v.reported_unit) as copy_hash,
        -- one result: the same source + person + specimen + analyte; without a specimen id,
        -- the same source + person + collection date + analyte
        hash(v.source_id, v.analyte, v.specimen_id, v.person_key,
             case when v.specimen_id is null then v.collected_date end) as result_hash,
        case when v.value is not null
             then hash(v.person_key, v.analyte, v.collected_date, v.comparator, round(v.value, 4))
        end as value_hash
    from versions_in_scope as v
    anti join in_conflict as x on x.file_id = v.file_id and x.line_no = v.line_no
    where v.reported_date <= $as_of
),
repeated_copy as (
    select copy_hash from keyed group by copy_hash having count(*) > 1
),
copies as (
    select k.*, 1 as copy_number
    from keyed as k
    anti join repeated_copy as r on r.copy_hash = k.copy_hash
    union all
    select
        k.*,
        row_number() over (
            partition by v.source_id, v.person_key, v.specimen_id, v.analyte, v.collected_date,
                         v.status, v.value_text, v.reported_unit
            order by k.file_id, k.line_no
        ) as copy_number
    from keyed as k
    semi join repeated_copy as r on r.copy_hash = k.copy_hash
    join versions_in_scope as v on v.file_id = k.file_id and v.line_no = k.line_no
),
originals as not materialized (
    select * from copies where copy_number = 1
),
repeated_result as (
    select result_hash from originals group by result_hash having count(*) > 1
),
versions as (
    select o.*, 1 as recency
    from originals as o
    anti join repeated_result as r on r.result_hash = o.result_hash
    union all
    select
        o.*,
        row_number() over (
            partition by v.source_id, v.analyte, v.specimen_id, v.person_key,
                         case when v.specimen_id is null then v.collected_date end
            order by o.reported_date desc, o.status in ('amended', 'corrected') desc,
                     o.file_id desc, o.line_no desc
        ) as recency
    from originals as o
    semi join repeated_result as r on r.result_hash = o.result_hash
    join versions_in_scope as v on v.file_id = o.file_id and v.line_no = o.line_no
),
within_source as (
    select c.file_id, c.line_no, 'duplicate' as outcome
    from copies as c
    where c.copy_number > 1
    union all
    select
        v.file_id,
        v.line_no,
        case
            when v.recency > 1 then 'superseded'
            when v.status in ('final', 'amended', 'corrected') then 'accepted'
            when v.status in ('cancelled', 'entered-in-error') then 'withdrawn'
            when v.status = 'preliminary' then 'pending'
        end as outcome
    from versions as v
),
accepted_values as not materialized (
    select v.file_id, v.line_no, v.value_hash
    from versions as v
    where v.recency = 1 and v.status in ('final', 'amended', 'corrected') and v.value_hash is not null
),
shared_value as (
    -- the same person, analyte, day, comparator and value accepted more than once (from one
    -- source these are different specimens, and the window below leaves them alone)
    select value_hash from accepted_values group by value_hash having count(*) > 1
),
across_sources as (
    select
        a.file_id,
        a.line_no,
        x.source_id,
        first_value(x.source_id) over (
            partition by x.person_key, x.analyte, x.collected_date, x.comparator, round(x.value, 4)
            order by x.reported_date, x.source_id, x.file_id, x.line_no
        ) as kept_source
    from accepted_values as a
    semi join shared_value as s on s.value_hash = a.value_hash
    join versions_in_scope as x on x.file_id = a.file_id and x.line_no = a.line_no
)
select
    w.file_id,
    w.line_no,
    case when a.source_id <> a.kept_source then 'duplicate' else w.outcome end as outcome
from within_source as w
left join across_sources as a on a.file_id = w.file_id and a.line_no = w.line_no
union all
select x.file_id, x.line_no, 'rejected' as outcome
from in_conflict as x
