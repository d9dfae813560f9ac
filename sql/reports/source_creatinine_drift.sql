-- source_creatinine_drift: per lab source, collection month, sex and adult age band, the median
-- serum creatinine against the median of the same stratum's values in the previous
-- $drift_months months. An assay or calibration change at one lab can fake a prevalence jump;
-- a month whose median moves by more than $drift_threshold (as a fraction) with at least
-- $drift_min_results results on both sides is flagged.
with values_ as (
    select r.source_id,
           date_trunc('month', r.collected_date) as month_start,
           r.sex,
           case when r.age_years < 40 then '18-39' when r.age_years < 60 then '40-59'
                when r.age_years < 80 then '60-79' else '80+' end as age_group,
           r.value as creatinine_mg_dl
    from results_known as r
    where r.analyte = 'creatinine' and r.comparator is null and r.age_years >= 18
      and r.sex in ('F', 'M')
),
months as (
    select source_id, month_start, sex, age_group,
           count(*) as results, median(creatinine_mg_dl) as median_mg_dl
    from values_
    group by all
),
value_counts as (
    -- each distinct value once per cell and month, with how many results had it: a window's
    -- median is taken from these counts, not from every value (medians keep all their values
    -- in memory: at 30M results the plain join of every value went past DuckDB's limit)
    select source_id, month_start, sex, age_group, creatinine_mg_dl, count(*) as n
    from values_
    group by all
),
window_counts as (
    -- each cell's previous $drift_months months, pooled
    select m.source_id, m.month_start, m.sex, m.age_group, c.creatinine_mg_dl, sum(c.n) as n
    from months as m
    join value_counts as c
        on c.source_id = m.source_id and c.sex = m.sex and c.age_group = m.age_group
       and c.month_start >= m.month_start - to_months(cast($drift_months as integer))
       and c.month_start < m.month_start
    group by all
),
cumulative as (
    select *,
           sum(n) over (partition by source_id, month_start, sex, age_group
                        order by creatinine_mg_dl rows unbounded preceding) as up_to,
           sum(n) over (partition by source_id, month_start, sex, age_group) as total
    from window_counts
),
previous as (
    -- the median: the middle value, or the mean of the two middle values of an even count
    select source_id, month_start, sex, age_group,
           any_value(total) as previous_results,
           (min(creatinine_mg_dl) filter (where up_to >= (total + 1) // 2)
            + min(creatinine_mg_dl) filter (where up_to >= total // 2 + 1)) / 2 as previous_median_mg_dl
    from cumulative
    group by all
),
compared as (
    select m.*,
           coalesce(p.previous_results, 0) as previous_results,
           p.previous_median_mg_dl
    from months as m
    left join previous as p
        on p.source_id = m.source_id and p.month_start = m.month_start and p.sex = m.sex
       and p.age_group = m.age_group
)
select
    $period as period,
    source_id,
    strftime(month_start, '%Y-%m') as month,
    sex,
    age_group,
    results,
    round(median_mg_dl, 3) as median_mg_dl,
    previous_results,
    round(previous_median_mg_dl, 3) as previous_median_mg_dl,
    round(median_mg_dl / nullif(previous_median_mg_dl, 0) - 1, 4) as relative_change,
    coalesce(results >= $drift_min_results and previous_results >= $drift_min_results
             and abs(median_mg_dl / nullif(previous_median_mg_dl, 0) - 1) > $drift_threshold, false)
        as is_drift_flagged
from compared
order by source_id, month, sex, age_group
