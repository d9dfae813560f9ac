"""Tests for pipeline.stages.link.shards: which shard a person falls in.

Outside facts: the shard of a person is the integer value of the first 8 hex digits of the key
modulo the shard count (Python's ``int(text, 16)`` is the reference for hex); HMAC-SHA256 output
is indistinguishable from uniform (RFC 2104 / FIPS 198-1, common practice), so shards are even
in size: checked with scipy's chi-square goodness-of-fit test.
"""

from __future__ import annotations

import hashlib
import hmac

import duckdb
import polars as pl
import pytest
from scipy.stats import chisquare

from pipeline.stages.link.shards import SHARD_OUTPUTS, shard_expression


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
