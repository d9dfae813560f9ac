"""Tests for pipeline.stages.link.shards: which shard a person falls in, and what each shard is
sent (every person of a full build; only the changed persons of a month, with their measures).

Outside facts: the shard of a person is the integer value of the first 8 hex digits of the key
modulo the shard count (Python's ``int(text, 16)`` is the reference for hex); HMAC-SHA256 output
is indistinguishable from uniform (RFC 2104 / FIPS 198-1, common practice), so shards are even
in size: checked with scipy's chi-square goodness-of-fit test.
"""

from __future__ import annotations

import hashlib
import hmac
from pathlib import Path

import duckdb
import polars as pl
import pytest
from scipy.stats import chisquare

from pipeline.stages.link.shards import (
    SHARD_INPUTS,
    SHARD_OUTPUTS,
    export_shard_inputs,
    shard_expression,
)


def keys(n: int) -> list[str]:
    return [
        hmac.new(b"k" * 32, f"person-{i}".encode(), hashlib.sha256).hexdigest() for i in range(n)
    ]


@pytest.mark.parametrize("shards", [1, 2, 3, 7, 16])
def test_each_person_is_in_the_shard_of_its_first_8_hex_digits(shards):
    people = keys(500)
    con = duckdb.connect()
    con.register("people", pl.DataFrame({"person_key": people}))
    got = con.execute(
        f"select person_key, {shard_expression()} from people", {"shards": shards}
    ).fetchall()
    assert dict(got) == {k: int(k[:8], 16) % shards for k in people}


def test_shards_are_even_for_hmac_keys():
    people = keys(4000)
    counts = [0] * 4
    for k in people:
        counts[int(k[:8], 16) % 4] += 1
    con = duckdb.connect()
    con.register("people", pl.DataFrame({"person_key": people}))
    got = con.execute(
        f"select {shard_expression()} as s, count(*) from people group by s order by s",
        {"shards": 4},
    ).fetchall()
    assert [c for _, c in got] == counts
    assert chisquare(counts).pvalue > 0.001


def test_the_shard_count_is_a_bound_parameter_not_text():
    assert "$shards" in shard_expression()
    con = duckdb.connect()
    with pytest.raises(duckdb.Error):  # a text count is refused by the type, never run as SQL
        con.execute(
            f"select {shard_expression()} from (select 'ab' as person_key)",
            {"shards": "3; drop table runs"},
        )


def test_a_shard_writes_the_person_level_tables():
    assert SHARD_OUTPUTS == (
        "measures_known",
        "daily_values_averaged",
        "kidney_events",
        "person_status",
    )


def _warehouse(people: list[str]) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.execute("create schema reference")
    con.execute("create table reference.age_bands as select 18 as age_min")
    for table in SHARD_INPUTS:
        con.execute(f"create table {table} as select unnest($k) as person_key", {"k": people})
    return con


@pytest.mark.parametrize("shards", [1, 3])
def test_every_person_is_sent_once_to_their_own_shard(tmp_path: Path, shards):
    people = keys(60)
    con = _warehouse(people)
    folders = export_shard_inputs(con, tmp_path / "work", shards)
    sent = {}
    for shard, folder in enumerate(folders):
        assert folder.is_absolute()
        # a full build sends results only: the shard measures them itself
        assert sorted(p.name for p in folder.glob("*.parquet")) == ["results_known.parquet"]
        got = pl.read_parquet(folder / "results_known.parquet")["person_key"].to_list()
        assert all(int(k[:8], 16) % shards == shard for k in got)
        sent.update(dict.fromkeys(got, shard))
    assert sorted(sent) == sorted(people)
    assert (tmp_path / "work" / "reference" / "age_bands.parquet").is_file()


def test_a_month_sends_only_its_changed_persons_with_their_measures(tmp_path: Path):
    people = keys(60)
    con = _warehouse(people)
    changed = people[::7]
    con.execute("create table link_persons as select unnest($k) as person_key", {"k": changed})
    folders = export_shard_inputs(con, tmp_path / "work", 3, persons="link_persons")
    for table in SHARD_INPUTS:
        sent = [k for f in folders for k in pl.read_parquet(f / f"{table}.parquet")["person_key"]]
        assert sorted(sent) == sorted(changed), table
