-- lab_egfr_agreement: how each lab's own eGFR compares with ours, per source and collection
-- month, as known at the period end. Pairs = creatinine results with a lab-reported eGFR on the
-- same specimen. Differences are lab minus recomputed creatinine eGFR (CKD-EPI 2021 from 18).
-- P10 / P30: share of pairs within 10 % / 30 % of ours (P30 is the usual accuracy measure for
-- eGFR equations, common practice). A censored lab value (">90") agrees when ours is on the same
-- side of the bound. A lab still reporting an older equation (e.g. CKD-EPI 2009) shows here as a
-- steady bias; a sudden shift in one month points at an assay or calibration change.
with pairs as (
    select
        source_id,
        strftime(collected_date, '%Y-%m') as month,
        egfr_creatinine as ours,
        lab_reported_egfr as lab,
        lab_reported_egfr_comparator as lab_comparator
    from measures_known
    where analyte = 'creatinine'
      and egfr_creatinine is not null and lab_reported_egfr is not null
)
select
    $period as period,
    source_id,
    month,
    count(*) as pairs,
    count(*) filter (where lab_comparator is null) as pairs_exact,
    round(median(lab - ours) filter (where lab_comparator is null), 2) as median_difference,
    round(avg(abs(lab - ours)) filter (where lab_comparator is null), 2) as mean_absolute_difference,
    round(avg(case when abs(lab - ours) <= 0.10 * ours then 1.0 else 0.0 end)
          filter (where lab_comparator is null), 4) as p10,
    round(avg(case when abs(lab - ours) <= 0.30 * ours then 1.0 else 0.0 end)
          filter (where lab_comparator is null), 4) as p30,
    count(*) filter (where lab_comparator is not null) as pairs_censored,
    round(avg(case
              when lab_comparator in ('>', '>=') and ours >= lab then 1.0
              when lab_comparator in ('<', '<=') and ours <= lab then 1.0
              else 0.0 end) filter (where lab_comparator is not null), 4) as censored_agreement
from pairs
group by source_id, month
order by source_id, month
