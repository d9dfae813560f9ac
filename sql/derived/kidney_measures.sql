-- kidney_measures: eGFR per serum creatinine (and cystatin C), albuminuria on one scale, and
-- their KDIGO categories, one row per measured result.
--
-- Reads `measure_ages` (sql/derived/measure_ages.sql: the lab_results rows to measure, with the
-- age at collection and sex as a boolean; the measure stage inlines it over the rows it
-- measures). Every coefficient comes from
-- `reference.equation_coefficients` (written each run from pipeline/core/equations.py, the one
-- place a published number is written; one row per equation, one column per coefficient) and
-- `reference.dipstick_categories`; the KDIGO G bounds from `reference.gfr_categories`. The
-- choices of config/pipeline.yaml (`measures`) are bound parameters. No number of a paper is
-- written here.
--
-- The equations (eGFR in mL/min/1.73 m², creatinine Scr in mg/dL, cystatin C Scys in mg/L):
--   CKD-EPI 2021 creatinine (Inker et al., N Engl J Med 2021;385:1737) and CKD-EPI 2009 without
--     its race term (Levey et al., Ann Intern Med 2009;150:604), from 18:
--     multiplier × min(Scr/κ, 1)^α × max(Scr/κ, 1)^β × age_base^age × female_factor[if female]
--   CKD-EPI 2012 cystatin C (Inker et al., N Engl J Med 2012;367:20), from 18:
--     multiplier × min(Scys/κ, 1)^α × max(Scys/κ, 1)^β × age_base^age × female_factor[if female]
--   CKD-EPI 2021 creatinine-cystatin C (Inker et al., N Engl J Med 2021;385:1737), from 18: both
--     two-slope terms multiplied (coefficients from memory, see equations.py)
--   EKFC (Pottel et al., Ann Intern Med 2021;174:183), from 2:
--     multiplier / (Scr/Q)^α × age_base^(age − 40) [above 40 only], α below or above Scr/Q = 1;
--     Q by sex, the adult constant from 18, below 18 ln Q (µmol/L) = c0 + c1·age + c2·ln(age)
--     + c3·age² + c4·age³ (child polynomials from memory)
--   CKiD U25 (Pierce et al., Kidney Int 2021;99:948), 1 to 25: K × height (m) / Scr, K by sex and
--     age band (growth factors from memory)
--   KDIGO 2012 categories (Kidney Int Suppl 2013;3:1): G on the unrounded eGFR, lower bound
--     inclusive; A1/A2/A3 in the unit KDIGO gives thresholds for (30/300 mg/g, 3/30 mg/mmol,
--     30/300 mg/24 h); a dipstick reading gives an approximate category only
--   ACR from a protein ratio (Sumida et al., Ann Intern Med 2020;173:426, crude, from memory):
--     exp(intercept + b_low·ln(min(PCR/50, 1)) + b_mid·ln(max(min(PCR/500, 1), 0.1))
--         + b_high·ln(max(PCR/500, 1)))
--
-- Anything not computable is null with a reason. The arithmetic is written in the same order as
-- the polars expressions of pipeline/core/equations.py, so both give the same floating-point
-- numbers to the last bit (tests/unit/stages/test_measure_sql.py): products left to right, age²
-- as age × age, and a division by a constant as a product with its reciprocal, `x * (1.0 / k)`
-- (polars divides by a constant so; x / k can differ from it in the last binary digit).
with coefficients as (
    select * from reference.equation_coefficients
),
cys as (select * from coefficients where equation = 'ckd_epi_2012_cystatin'),
cr_cys as (select * from coefficients where equation = 'ckd_epi_2021_creatinine_cystatin'),
pcr_to_acr as (select * from coefficients where equation = 'sumida_pcr_to_acr'),
thresholds as (
    select equation as scale, a2_from, a3_above, unit from coefficients
    where form = 'albuminuria_thresholds'
),

-- which creatinine equation applies, by age (project decision 3)
creatinine_rows as (
    select *,
           case when comparator is not null or sex = 'U' or age_exact < $min_age_years then null
                when age_exact >= $adult_min_age_years then $adult_equation
                when age_exact >= $min_age_years and age_exact < $adult_min_age_years
                     and height_cm is not null and $use_height_for_children
                    then $child_equation_with_height
                when age_exact >= $min_age_years and age_exact < $adult_min_age_years
                    then $child_equation
           end as equation_chosen
    from measure_ages
    where analyte = 'creatinine'
),
creatinine_egfr as (
    select r.*,
        case
            when not (isfinite(r.value) and r.value > 0) or not isfinite(r.age_exact) then null
            when c.form = 'ckd_epi_creatinine' and r.age_exact >= c.min_age then
                c.multiplier
                * (pow(least(r.value / (case when r.female then c.kappa_female when not r.female then c.kappa_male end), 1.0),
                       case when r.female then c.alpha_female when not r.female then c.alpha_male end)
                   * pow(greatest(r.value / (case when r.female then c.kappa_female when not r.female then c.kappa_male end), 1.0),
                         c.beta))
                * pow(c.age_base, r.age_exact)
                * (case when r.female then c.female_factor when not r.female then 1.0 end)
            when c.form = 'ekfc' and r.age_exact >= c.min_age then
                c.multiplier
                / pow(r.value / r.ekfc_q,
                      case when r.value / r.ekfc_q < 1.0 then c.alpha_below else c.alpha_above end)
                * (case when r.age_exact > c.age_pivot then pow(c.age_base, r.age_exact - c.age_pivot)
                        else 1.0 end)
            when c.form = 'ckid_u25' and isfinite(r.height_cm) and r.height_cm > 0
                 and r.age_exact >= c.min_age and r.age_exact <= c.max_age then
                (case when r.female then
                        case when r.age_exact < c.pivot_age
                                 then c.k_pivot_female * pow(c.growth_child_female, r.age_exact - c.pivot_age)
                             when r.age_exact < c.adult_from_age
                                 then c.k_pivot_female * pow(c.growth_adolescent_female, r.age_exact - c.pivot_age)
                             else c.k_adult_female end
                      when not r.female then
                        case when r.age_exact < c.pivot_age
                                 then c.k_pivot_male * pow(c.growth_child_male, r.age_exact - c.pivot_age)
                             when r.age_exact < c.adult_from_age
                                 then c.k_pivot_male * pow(c.growth_adolescent_male, r.age_exact - c.pivot_age)
                             else c.k_adult_male end
                 end)
                * (r.height_cm * (1.0 / 100.0)) / r.value
        end as egfr_creatinine
    from (
        -- EKFC's Q (mg/dL): the adult constant from adult_from_age, the child polynomial below
        select r.*,
            case when c.form <> 'ekfc' or not isfinite(r.age_exact) or r.age_exact < c.min_age then null
                 when r.age_exact >= c.adult_from_age then
                     case when r.female then c.q_adult_female_mg_dl when not r.female then c.q_adult_male_mg_dl end
                 when r.female then
                     exp(c.child_ln_q_female_c0 + c.child_ln_q_female_c1 * r.age_exact
                         + c.child_ln_q_female_c2 * ln(r.age_exact)
                         + c.child_ln_q_female_c3 * (r.age_exact * r.age_exact)
                         + c.child_ln_q_female_c4 * (r.age_exact * r.age_exact * r.age_exact))
                     * (1.0 / c.creatinine_umol_l_per_mg_dl)
                 when not r.female then
                     exp(c.child_ln_q_male_c0 + c.child_ln_q_male_c1 * r.age_exact
                         + c.child_ln_q_male_c2 * ln(r.age_exact)
                         + c.child_ln_q_male_c3 * (r.age_exact * r.age_exact)
                         + c.child_ln_q_male_c4 * (r.age_exact * r.age_exact * r.age_exact))
                     * (1.0 / c.creatinine_umol_l_per_mg_dl)
            end as ekfc_q
        from creatinine_rows as r
        left join coefficients as c on c.equation = r.equation_chosen
    ) as r
    left join coefficients as c on c.equation = r.equation_chosen
),

-- cystatin C: CKD-EPI 2012 for each uncensored cystatin C of an adult
cystatin_rows as (
    select a.*,
        case when a.comparator is null and a.age_exact >= $adult_min_age_years
                  and isfinite(a.value) and a.value > 0 and isfinite(a.age_exact)
                  and a.age_exact >= cys.min_age then
            cys.multiplier
            * (pow(least(a.value * (1.0 / cys.kappa), 1.0), cys.alpha)
               * pow(greatest(a.value * (1.0 / cys.kappa), 1.0), cys.beta))
            * pow(cys.age_base, a.age_exact)
            * (case when a.female then cys.female_factor when not a.female then 1.0 end)
        end as egfr_cystatin_only
    from measure_ages as a, cys
    where a.analyte = 'cystatin_c' and $use_cystatin
),
-- the day's mean uncensored cystatin C, for the combined equation on that day's creatinine
same_day_cystatin as (
    select person_key, collected_date, avg(value) as scys
    from cystatin_rows
    where comparator is null and $combine_same_day_cystatin
    group by person_key, collected_date
),
creatinine_with_cystatin as (
    select e.*,
        e.scys is not null and e.egfr_creatinine is not null
            and e.age_exact >= $adult_min_age_years as use_combined,
        case when isfinite(e.value) and e.value > 0 and isfinite(e.scys) and e.scys > 0
                  and isfinite(e.age_exact) and e.age_exact >= cr_cys.min_age then
            cr_cys.multiplier
            * (pow(least(e.value / (case when e.female then cr_cys.kappa_female when not e.female then cr_cys.kappa_male end), 1.0),
                   case when e.female then cr_cys.alpha_female when not e.female then cr_cys.alpha_male end)
               * pow(greatest(e.value / (case when e.female then cr_cys.kappa_female when not e.female then cr_cys.kappa_male end), 1.0),
                     cr_cys.beta_creatinine))
            * (pow(least(e.scys * (1.0 / cr_cys.kappa_cystatin), 1.0), cr_cys.alpha_cystatin)
               * pow(greatest(e.scys * (1.0 / cr_cys.kappa_cystatin), 1.0), cr_cys.beta_cystatin))
            * pow(cr_cys.age_base, e.age_exact)
            * (case when e.female then cr_cys.female_factor when not e.female then 1.0 end)
        end as egfr_combined
    from (
        select e.*, d.scys
        from creatinine_egfr as e
        left join same_day_cystatin as d
            on d.person_key = e.person_key and d.collected_date = e.collected_date
    ) as e, cr_cys
),
-- the lab's own eGFR of the same person, source and specimen (first in file order), for comparison
reported_egfr as (
    select source_id, person_key, specimen_id,
           first(value order by file_id, line_no) as lab_reported_egfr,
           first(comparator order by file_id, line_no) as lab_reported_egfr_comparator
    from measure_ages
    where analyte = 'egfr_reported' and specimen_id is not null
    group by source_id, person_key, specimen_id
),
creatinine_measures as (
    select e.*,
        case when e.use_combined then e.egfr_combined else e.egfr_creatinine end as egfr,
        case when e.use_combined then 'ckd_epi_2021_creatinine_cystatin'
             when e.egfr_creatinine is not null then e.equation_chosen end as egfr_equation,
        case when e.comparator is not null then 'censored_creatinine'
             when e.age_exact < $min_age_years then 'age_under_minimum'
             when e.sex = 'U' then 'sex_unknown'
             when e.egfr_creatinine is null then 'outside_equation_range'
        end as egfr_reason,
        p.lab_reported_egfr, p.lab_reported_egfr_comparator
    from creatinine_with_cystatin as e
    left join reported_egfr as p
        on p.source_id = e.source_id and p.person_key = e.person_key and p.specimen_id = e.specimen_id
),
-- a cystatin C on a day whose creatinine got the combined equation has no eGFR of its own, so
-- the day is counted once
combined_days as (
    select distinct person_key, collected_date from creatinine_measures
    where egfr_equation = 'ckd_epi_2021_creatinine_cystatin'
),
cystatin_measures as (
    select c.*,
        case when d.person_key is null then c.egfr_cystatin_only end as egfr,
        d.person_key is not null as has_combined
    from cystatin_rows as c
    left join combined_days as d
        on d.person_key = c.person_key and d.collected_date = c.collected_date
),
egfr_rows as (
    select source_id, file_id, line_no, person_key, specimen_id, collected_date, reported_date,
           analyte, sex, age_years, district_code,
           egfr, egfr_equation, egfr_reason, egfr_creatinine,
           lab_reported_egfr, lab_reported_egfr_comparator
    from creatinine_measures
    union all by name
    select source_id, file_id, line_no, person_key, specimen_id, collected_date, reported_date,
           analyte, sex, age_years, district_code,
           egfr,
           case when egfr is not null then 'ckd_epi_2012_cystatin' end as egfr_equation,
           case when has_combined then 'combined_with_creatinine'
                when comparator is not null then 'censored_cystatin'
                when egfr is null then 'outside_equation_range'
           end as egfr_reason,
           null::double as egfr_creatinine,
           null::double as lab_reported_egfr, null::varchar as lab_reported_egfr_comparator
    from cystatin_measures
),
egfr_categorised as (
    select e.*,
        case when isfinite(e.egfr) then g.g_category end as g_category,
        e.egfr > $hyperfiltration_ml_min_1_73m2 as is_hyperfiltration
    from egfr_rows as e
    left join reference.gfr_categories as g
        on isfinite(e.egfr) and e.egfr >= g.lower_bound and e.egfr < g.upper_bound
),

-- albuminuria: every basis onto one scale (ACR mg/g, or AER mg/24 h for a timed collection)
urine_creatinine as (
    select source_id, person_key, specimen_id, collected_date, file_id, line_no,
           value as ucreat_mg_dl, comparator as ucreat_comparator
    from measure_ages
    where analyte = 'urine_creatinine'
),
albumin_with_creatinine as (
    -- the same specimen; without a specimen id, the same person and day (the first urine
    -- creatinine of the day in file order)
    select a.*, u.ucreat_mg_dl, u.ucreat_comparator
    from measure_ages as a
    join urine_creatinine as u
        on u.source_id = a.source_id and u.person_key = a.person_key and u.specimen_id = a.specimen_id
    where a.analyte = 'urine_albumin' and a.specimen_id is not null
    union all
    select a.*, u.ucreat_mg_dl, u.ucreat_comparator
    from measure_ages as a
    join (
        select * from urine_creatinine where specimen_id is null
        qualify row_number() over (partition by source_id, person_key, collected_date
                                   order by file_id, line_no) = 1
    ) as u
        on u.source_id = a.source_id and u.person_key = a.person_key
       and u.collected_date = a.collected_date
    where a.analyte = 'urine_albumin' and a.specimen_id is null
),
albuminuria_rows as (
    select *, 'measured_acr' as acr_basis, value as acr_mg_g, comparator as acr_comparator,
           null::double as aer_mg_24h, null::varchar as reading
    from measure_ages where analyte = 'acr'
    union all by name
    select measure_ages.* exclude (reported_value, reported_unit),
           null::double as reported_value, null::varchar as reported_unit,
           'estimated_from_pcr' as acr_basis,
           case when comparator is null and isfinite(value) and value > 0 then
               exp(k.intercept
                   + k.b_low * ln(least(value * (1.0 / k.knot_low), 1.0))
                   + k.b_mid * ln(least(greatest(value * (1.0 / k.knot_high), k.mid_floor), 1.0))
                   + k.b_high * ln(greatest(value * (1.0 / k.knot_high), 1.0)))
           end as acr_mg_g,
           null::varchar as acr_comparator, null::double as aer_mg_24h, null::varchar as reading
    from measure_ages, pcr_to_acr as k where analyte = 'pcr'
    union all by name
    select * exclude (reported_value, reported_unit, ucreat_mg_dl, ucreat_comparator),
           null::double as reported_value, null::varchar as reported_unit,
           'computed_from_albumin_and_creatinine' as acr_basis,
           -- 100 × albumin (mg/L) / creatinine (mg/dL) = mg/g (KDIGO 2012)
           case when comparator is null and ucreat_comparator is null and ucreat_mg_dl > 0
                then 100 * value / ucreat_mg_dl end as acr_mg_g,
           null::varchar as acr_comparator, null::double as aer_mg_24h, null::varchar as reading
    from albumin_with_creatinine
    union all by name
    select * exclude (reported_value, reported_unit),
           null::double as reported_value, null::varchar as reported_unit,
           'timed_albumin_excretion' as acr_basis, null::double as acr_mg_g,
           comparator as acr_comparator, value as aer_mg_24h, null::varchar as reading
    from measure_ages where analyte = 'urine_albumin_24h'
    union all by name
    select * exclude (reported_value, reported_unit),
           null::double as reported_value, null::varchar as reported_unit,
           'estimated_from_dipstick' as acr_basis, null::double as acr_mg_g,
           null::varchar as acr_comparator, null::double as aer_mg_24h,
           (select o.reading from reference.ordinal_readings as o
            where o.analyte = 'urine_protein_dipstick'
              and o.spelling = lower(trim(value_text, e' \t\n\r\x0b\x0c'))) as reading
    from measure_ages where analyte = 'urine_protein_dipstick'
),
-- the value compared and its thresholds, in the unit KDIGO gives them for: a measured ACR
-- reported in mg/mmol on the reported number, a timed excretion in mg/24 h, any other in mg/g
albuminuria_compared as (
    select r.*, t.a2_from, t.a3_above,
        case when t.scale = 'acr_mg_mmol' then r.reported_value
             when t.scale = 'aer_mg_24h' then r.aer_mg_24h
             else r.acr_mg_g end as cat_value,
        d.a_category as dipstick_category, coalesce(d.is_spanning, false) as dipstick_spans
    from albuminuria_rows as r
    join thresholds as t on t.scale = case
        when r.acr_basis = 'measured_acr' and r.reported_unit = (select unit from thresholds where scale = 'acr_mg_mmol')
            then 'acr_mg_mmol'
        when r.acr_basis = 'timed_albumin_excretion' then 'aer_mg_24h'
        else 'acr_mg_g' end
    left join reference.dipstick_categories as d on d.reading = lower(trim(r.reading, e' \t\n\r\x0b\x0c'))
),
-- the A category, counting a censored value only as far as it is certain: "<X" with X <= A2
-- start (or "<=X" below it) is A1; ">X" with X >= the A3 bound is A3, and ">=X" when every value
-- it admits is above A2; anything else spans two categories and stays null
albuminuria_categorised as (
    select *,
        case when acr_basis = 'estimated_from_dipstick' and a_category is not null
                 then a_category in ('A2', 'A3')
             when acr_basis = 'estimated_from_dipstick' then null
             when not coalesce(isfinite(cat_value) and cat_value >= 0, false) then null
             when acr_comparator is null then cat_value >= a2_from
             when acr_comparator = '<' and cat_value <= a2_from then false
             when acr_comparator = '<=' and cat_value < a2_from then false
             when acr_comparator in ('>', '>=') and cat_value >= a2_from then true
        end as is_at_or_above_a2
    from (
        select *,
            case when acr_basis = 'estimated_from_dipstick' then dipstick_category
                 when not coalesce(isfinite(cat_value) and cat_value >= 0, false) then null
                 when acr_comparator is null then
                     case when cat_value < a2_from then 'A1'
                          when (cat_value <= a3_above and $acr_300_is_a2)
                               or (cat_value < a3_above and not $acr_300_is_a2) then 'A2'
                          else 'A3' end
                 when acr_comparator = '<' and cat_value <= a2_from then 'A1'
                 when acr_comparator = '<=' and cat_value < a2_from then 'A1'
                 when acr_comparator = '>' and cat_value >= a3_above then 'A3'
                 when acr_comparator = '>='
                      and ((cat_value > a3_above and $acr_300_is_a2)
                           or (cat_value >= a3_above and not $acr_300_is_a2)) then 'A3'
            end as a_category
        from albuminuria_compared
    )
),
albuminuria_measures as (
    select source_id, file_id, line_no, person_key, specimen_id, collected_date, reported_date,
           analyte, sex, age_years, district_code,
           -- a censored bound is not a measured value: it stays in lab_results only
           case when acr_comparator is null then acr_mg_g end as acr_mg_g,
           acr_comparator,
           case when acr_comparator is null then aer_mg_24h end as aer_mg_24h,
           acr_basis,
           acr_basis in ('estimated_from_pcr', 'estimated_from_dipstick') as is_acr_estimated,
           a_category,
           case when a_category is not null then null
                when acr_basis = 'estimated_from_dipstick' and dipstick_spans
                    then 'dipstick_trace_spans_a1_a2'
                when acr_comparator is not null and is_at_or_above_a2 is null
                    then 'censored_spans_a2_threshold'
                when acr_comparator is not null then 'censored_ambiguous'
                else 'not_computable'
           end as acr_reason,
           is_at_or_above_a2
    from albuminuria_categorised
)
select source_id, file_id::bigint as file_id, line_no::bigint as line_no, person_key, specimen_id,
       collected_date, reported_date, analyte, sex, age_years::bigint as age_years, district_code,
       egfr, egfr_equation, g_category, egfr_reason, is_hyperfiltration,
       egfr_creatinine, lab_reported_egfr, lab_reported_egfr_comparator,
       acr_mg_g, acr_comparator, aer_mg_24h, acr_basis, is_acr_estimated, a_category,
       acr_reason, is_at_or_above_a2
from (
    select * from egfr_categorised
    union all by name
    select * from albuminuria_measures
)
order by person_key, collected_date, analyte, file_id, line_no
