"""Tests for pipeline.stages.link.stage: the shards' tables are put back together in the row
order of one run.

Outside facts: SQL sorts NULL first in ascending order in DuckDB's ``NULLS FIRST`` (the order
``nulls_last=False`` asks of polars), and a sort by several keys is lexicographic (Python's
``sorted`` on tuples is the reference).
"""

from __future__ import annotations

import random

import duckdb
import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.stages.link.shards import SHARD_OUTPUTS
from pipeline.stages.link.stage import PERSON_TABLE_ORDER, LinkSummary


def test_every_shard_output_has_a_row_order():
    assert tuple(PERSON_TABLE_ORDER) == SHARD_OUTPUTS
    assert all(order[0] == "person_key" for order in PERSON_TABLE_ORDER.values())
    assert PERSON_TABLE_ORDER["person_status"] == ["person_key"]  # one row per person


@settings(max_examples=50, deadline=None, database=None)
@given(
    st.lists(
        st.tuples(st.sampled_from(["a1", "b2", "c3"]), st.sampled_from(["acr", "egfr"]),
                  st.one_of(st.none(), st.integers(0, 30))),
        min_size=1, max_size=40,
    ),
    st.integers(1, 4),
)  # fmt: skip
def test_shards_put_back_give_the_order_of_one_run(rows, shards):
    order = ["person_key", "measure", "day"]
    frame = pl.DataFrame(rows, schema=dict.fromkeys(order, pl.String) | {"day": pl.Int64},
                         orient="row")  # fmt: skip
    parts = [
        frame.filter(pl.Series([hash(r[0]) % shards == s for r in rows])) for s in range(shards)
    ]
    random.Random(0).shuffle(parts)
    together = pl.concat(parts).sort(order, nulls_last=False, maintain_order=True)
    con = duckdb.connect()
    expected = con.execute(
        "select * from frame order by person_key, measure, day nulls first"
    ).fetchall()
    assert together.rows() == expected


def test_the_summary_counts_recomputed_persons_apart():
    summary = LinkSummary(persons=10, events_confirmed=3, events_pending=1)
    assert summary.persons_recomputed == 0
    assert (summary.persons, summary.events_confirmed, summary.events_pending) == (10, 3, 1)
