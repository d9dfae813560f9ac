-- measure_ages: the rows the measure stage measures (`measure_input`, lab_results rows), with
-- the age at collection in years (`age_exact`, fractional) and sex as a boolean (`female`, null
-- when unknown), as sql/derived/kidney_measures.sql reads them.
--
-- The age is estimated from the birth year at mid-year ($mid_year_month, $mid_year_day: 1 July,
-- pipeline/core/measure_rules.py, MID_YEAR; common practice for birth-year-only data), in
-- years of $days_per_year days, never below 0; `age_years` becomes its completed years, so a
-- measure's age and the equation it got always agree. The division is written as a product with
-- the reciprocal, as the polars rules compute it (same bits; see kidney_measures.sql).
with aged as (
    select * replace (floor(age_exact)::bigint as age_years)
    from (
        select *,
               case when (collected_date - make_date(birth_year, $mid_year_month, $mid_year_day))
                         * (1.0 / $days_per_year) < 0 then 0.0
                    else (collected_date - make_date(birth_year, $mid_year_month, $mid_year_day))
                         * (1.0 / $days_per_year) end as age_exact,
               case when sex = 'F' then true when sex = 'M' then false end as female
        from measure_input
    )
)
select * from aged
