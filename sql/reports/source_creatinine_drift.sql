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
    from int_results_known as r
    where r.analyte = 'creatinine' and r.comparator is null and r.age_years >= 18
      and r.sex in ('F', 'M')
),
months as (
    select source_id, month_start, sex, age_group,
           count(*) as results, median(creatinine_mg_dl) as median_mg_dl
    from values_
    group by all
),
compared as (
    -- each cell against the same cell's previous $drift_months months (one join for both figures)
    select m.source_id, m.month_start, m.sex, m.age_group, m.results, m.median_mg_dl,
           count(v.creatinine_mg_dl) as previous_results,
           median(v.creatinine_mg_dl) as previous_median_mg_dl
    from months as m
    left join values_ as v
        on v.source_id = m.source_id and v.sex = m.sex and v.age_group = m.age_group
       and v.month_start >= m.month_start - to_months(cast($drift_months as integer))
       and v.month_start < m.month_start
    group by m.source_id, m.month_start, m.sex, m.age_group, m.results, m.median_mg_dl
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
