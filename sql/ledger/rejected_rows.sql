-- rejected_rows: every input row that failed a row-level rule, with the first reason found.
create table if not exists rejected_rows (
    source_id    varchar not null,
    file_id      bigint not null,
    file_path    varchar not null,
    line_no      bigint not null,
    raw_text     varchar,
    reason_code  varchar not null,
    message      varchar not null,
    primary key (file_id, line_no)
);
