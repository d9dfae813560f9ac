"""Scale-out: the person-level work run per person-hash shard, in this process and on a
2-worker local Dask cluster, gives byte-identical published exports and the same tables as the
local run."""

from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import duckdb
import pytest

from pipeline.run.flows import run_month_plain

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_extracts"
PERIOD = "2025-04"
SOURCES = ("westerfold_general_lab", "corvale_lab_chain", "fallowmere_reference_lab")
TABLES = ("person_status", "kidney_events", "measures_known", "daily_values_averaged",
          "published.district_ckd_prevalence", "published.district_screening_coverage",
          "published.district_decline_incidence")  # fmt: skip

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def inbox(tmp_path_factory):
    """The first six months of the samples: enough persons for every shard."""
    root = tmp_path_factory.mktemp("scale") / "inbox"
    months = ("2024-11", "2024-12", "2025-01", "2025-02", "2025-03", "2025-04")
    for source in SOURCES:
        for path in (SAMPLES / source).rglob("*"):
            if path.is_file() and any(
                m in path.as_posix() or m.replace("-", "") in path.name for m in months
            ):
                target = root / path.relative_to(SAMPLES)
                target.parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(path, target)
    return root


def _run(inbox: Path, out: Path, executor: str) -> tuple[dict[str, list[tuple]], dict[str, str]]:
    run_month_plain(
        PERIOD, str(REPO / "config"), str(inbox), str(out), demo=True, executor=executor
    )
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        tables = {t: con.execute(f"select * from {t} order by all").fetchall() for t in TABLES}
    finally:
        con.close()
    exports = {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
               for p in sorted((out / PERIOD).glob("*")) if p.suffix in (".csv", ".parquet")}  # fmt: skip
    return tables, exports


def test_shards_and_dask_equal_the_local_run(inbox, tmp_path):
    local = _run(inbox, tmp_path / "local", "local")
    for executor in ("shards", "dask"):
        tables, exports = _run(inbox, tmp_path / executor, executor)
        assert exports == local[1], executor
        for table, rows in local[0].items():
            assert tables[table] == rows, (executor, table)
    assert local[0]["person_status"], "the sample months should give persons"
