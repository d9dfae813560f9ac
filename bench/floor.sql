-- floor.sql: the core job of a monthly run in one DuckDB script, as the lower bound the
-- pipeline is compared with (bench/README.md). It does only this:
--   read the standard-layout CSVs; keep the latest report of each creatinine result when it is
--   final or amended and numeric (mg/dL, or umol/L / 88.4); CKD-EPI 2021 creatinine eGFR for
--   adults (Inker et al., NEJM 2021;385:1737); the KDIGO 2012 G category; a per-person sustained
--   40 % decline (a daily eGFR after the 90-day baseline window at or below 60 % of the baseline,
--   confirmed by another such value at least 28 days later); counts per district; Parquet out.
-- No ledger, no row accounting, no rejected-row reasons, no pseudonymisation, no versions of
-- other analytes, no as-of view, no disclosure control.
--
-- Inputs (DuckDB variables, set before running the script):
--   SET VARIABLE input_glob = '/path/inbox/westerfold_general_lab/*.csv';
--   SET VARIABLE out_dir = '/path/floor_out';   -- an existing folder
--   SET VARIABLE period_end = DATE '2026-10-31';
-- The value column is read as VARCHAR (and so is every other column): a TRY_CAST on a sniffed
-- column can be pushed into the CSV scanner as a hard cast, which aborts on values like '<3'.

create or replace temp table floor_rows as
select *
from read_csv(
    getvariable('input_glob'),
    header = true,
    delim = ',',
    quote = '"',
    columns = {
        'person_token': 'VARCHAR', 'birth_year': 'VARCHAR', 'sex': 'VARCHAR',
        'district_code': 'VARCHAR', 'specimen_id': 'VARCHAR', 'collected_date': 'VARCHAR',
        'test_code': 'VARCHAR', 'value': 'VARCHAR', 'unit': 'VARCHAR', 'status': 'VARCHAR',
        'height_cm': 'VARCHAR', 'reported_at': 'VARCHAR', 'fasting': 'VARCHAR'
    }
)
where test_code in ('2160-0', '14682-9');

create or replace temp table floor_egfr as
with latest as (
    -- the latest report of each result (an amendment or cancellation replaces the earlier one)
    select arg_max(r, (try_cast(r.reported_at as date), r.status = 'amended')) as r
    from floor_rows as r
    group by r.specimen_id, r.test_code
),
creatinine as (
    select
        r.person_token,
        r.district_code,
        upper(trim(r.sex)) as sex,
        try_cast(r.collected_date as date) as collected_date,
        try_cast(r.birth_year as integer) as birth_year,
        case
            when r.test_code = '2160-0' and trim(r.unit) = 'mg/dL' then try_cast(trim(r.value) || '' as double)
            when r.test_code = '14682-9' and trim(r.unit) = 'umol/L' then try_cast(trim(r.value) || '' as double) / 88.4
        end as scr_mg_dl
    from (select unnest(r) from latest) as r
    where r.status in ('final', 'amended')
),
adults as (
    select *, year(collected_date) - birth_year as age_years
    from creatinine
    where scr_mg_dl between 0.1 and 25 and sex in ('F', 'M') and collected_date <= getvariable('period_end')
      and year(collected_date) - birth_year between 18 and 120
),
egfr as (
    select
        person_token, district_code, sex, collected_date, age_years, scr_mg_dl,
        142 * pow(least(scr_mg_dl / kappa, 1), alpha) * pow(greatest(scr_mg_dl / kappa, 1), -1.200)
            * pow(0.9938, age_years) * case when sex = 'F' then 1.012 else 1 end as egfr
    from (
        select *,
               case when sex = 'F' then 0.7 else 0.9 end as kappa,
               case when sex = 'F' then -0.241 else -0.302 end as alpha
        from adults
    )
)
select *,
       case when egfr >= 90 then 'G1' when egfr >= 60 then 'G2' when egfr >= 45 then 'G3a'
            when egfr >= 30 then 'G3b' when egfr >= 15 then 'G4' else 'G5' end as g_category
from egfr;

create or replace temp table floor_persons as
with daily as (
    select person_token, collected_date as day, avg(egfr) as egfr
    from floor_egfr group by person_token, collected_date
),
first_day as (
    select person_token, min(day) as first_day from daily group by person_token
),
baseline as (
    select d.person_token, avg(d.egfr) as baseline_egfr, any_value(f.first_day) + 90 as baseline_end
    from daily as d join first_day as f using (person_token)
    where d.day <= f.first_day + 90
    group by d.person_token
),
low as (
    select d.person_token, min(d.day) as first_low, max(d.day) as last_low
    from daily as d join baseline as b using (person_token)
    where d.day > b.baseline_end and d.egfr <= 0.6 * b.baseline_egfr
    group by d.person_token
),
latest as (
    select person_token, arg_max(district_code, collected_date) as district_code,
           arg_max(g_category, collected_date) as g_category
    from floor_egfr group by person_token
)
select l.person_token, l.district_code, l.g_category,
       coalesce(w.last_low - w.first_low >= 28, false) as sustained_decline_40,
       case when w.last_low - w.first_low >= 28 then w.first_low end as decline_date
from latest as l left join low as w using (person_token);

copy (
    select district_code,
           count(*) as persons_tested,
           count(*) filter (where g_category in ('G3a', 'G3b', 'G4', 'G5')) as persons_g3_g5,
           count(*) filter (where sustained_decline_40) as persons_sustained_decline_40
    from floor_persons group by district_code order by district_code
) to (getvariable('out_dir') || '/district_counts.parquet') (format parquet);

copy (select * from floor_persons order by person_token)
    to (getvariable('out_dir') || '/person_decline.parquet') (format parquet);

copy (select * from floor_egfr) to (getvariable('out_dir') || '/egfr.parquet') (format parquet);
