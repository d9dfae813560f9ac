-- result_versions: every well-formed input row, one row per (file, line), in canonical units.
-- Its outcome (accepted, superseded, duplicate, withdrawn, pending; rejected for a specimen id under two persons) is settled each run by
-- result_versions_resolved.sql over all versions of the same result.
create table if not exists result_versions (
    source_id           varchar not null,
    file_id             bigint not null,
    line_no             bigint not null,
    person_key          varchar not null,
    specimen_id         varchar,
    collected_date      date not null,
    reported_date       date not null,
    reported_date_basis varchar not null,
    analyte             varchar not null,
    loinc               varchar not null,
    status              varchar not null,
    value_text          varchar,
    comparator          varchar,
    reported_value      double,
    reported_unit       varchar,
    value               double,
    unit                varchar,
    is_fasting          boolean,
    height_cm           double,
    sex                 varchar not null,
    birth_year          integer not null,
    age_years           integer not null,
    district_code       varchar,
    outcome             varchar,
    primary key (file_id, line_no)
);
