"""Shared fixtures: a small copy of the config, tiny inboxes, and a helper that runs one month.

Every test that writes files works under pytest's ``tmp_path``; nothing is written into the
working tree. ``small_config`` does not depend on ``config/regions/`` (another part of the
project ships it): it writes its own four-district region.
"""

from __future__ import annotations

import inspect
import os
import re
import shutil
import sys
from pathlib import Path

import duckdb
import pytest
import yaml
from hypothesis import settings as hypothesis_settings

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:  # the project is importable from the repo root
    sys.path.insert(0, str(ROOT))

# make test runs the tests in two processes (pytest-xdist): each gets a Prefect home of its own,
# so that the two temporary Prefect servers never share one database file
if os.environ.get("PYTEST_XDIST_WORKER"):
    _home = os.environ.get("PREFECT_HOME", str(ROOT / ".prefect"))
    os.environ["PREFECT_HOME"] = f"{_home}-{os.environ['PYTEST_XDIST_WORKER']}"

#: Hypothesis profiles (select one with HYPOTHESIS_PROFILE; the default is "dev"). Both turn the
#: deadline off: a two-core machine shared with other work makes one example's time meaningless.
#: Tests that name their own ``max_examples`` keep it (the slowest name theirs through
#: :func:`examples`); "ci" caps the others at 50 examples.
hypothesis_settings.register_profile("dev", deadline=None)
hypothesis_settings.register_profile("ci", max_examples=50, deadline=None)
PROFILE = os.environ.get("HYPOTHESIS_PROFILE", "dev")
hypothesis_settings.load_profile(PROFILE)


def examples(full: int, ci: int) -> int:
    """The example count of one of the slowest properties: ``full`` under the dev profile,
    ``ci`` under the ci profile (``make test``, CI: the suite's time, with new examples each run
    since nothing is derandomised)."""
    return ci if PROFILE == "ci" else full


#: A call that runs a whole month (or months): such a test is ``slow`` wherever it lives.
_WHOLE_MONTH = re.compile(r"\b(?:run_month|run_month_plain|monthly_flow|backfill_flow)\(")


def _calls_whole_month(func: object, helpers: set[str]) -> bool:
    """Whether ``func``'s source runs a month, itself or through a helper named in ``helpers``."""
    try:
        source = inspect.getsource(func)  # type: ignore[arg-type]
    except (OSError, TypeError):
        return False
    return bool(_WHOLE_MONTH.search(source)) or any(
        re.search(rf"\b{re.escape(name)}\(", source) for name in helpers
    )


def _month_helpers(module: object) -> set[str]:
    """Names of the module's functions that run a month, directly or through one another."""
    functions = {
        name: obj
        for name, obj in vars(module).items()
        if inspect.isfunction(obj) and getattr(obj, "__module__", None) == module.__name__  # type: ignore[attr-defined]
    }
    helpers: set[str] = set()
    while True:
        found = {
            n for n, f in functions.items() if n not in helpers and _calls_whole_month(f, helpers)
        }
        if not found:
            return helpers
        helpers |= found


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Mark ``slow`` every test that runs a whole month: one that calls ``run_month`` or
    ``run_month_plain`` (or a flow), in its body, through a helper of its module or through a
    fixture it uses. ``make test-fast`` (``-m "not slow"``) then runs no month at all; the
    integration tests are all ``slow`` (tests/integration/conftest.py), and a test that kills
    a process carries the mark by hand."""
    cache: dict[str, set[str]] = {}
    for item in items:
        if not isinstance(item, pytest.Function) or item.get_closest_marker("slow"):
            continue
        module = item.module
        if module.__name__ not in cache:
            cache[module.__name__] = _month_helpers(module)
        helpers = cache[module.__name__]
        fixtures = [d.func for defs in item._fixtureinfo.name2fixturedefs.values() for d in defs]
        if _calls_whole_month(item.function, helpers) or any(
            _calls_whole_month(f, helpers | _month_helpers(inspect.getmodule(f) or module))
            for f in fixtures
            if inspect.getmodule(f) is not None
        ):
            item.add_marker(pytest.mark.slow)


CONFIG_DIR = ROOT / "config"
FIXTURES = Path(__file__).resolve().parent / "fixtures"

#: The small region of every unit test (invented names in the fictional region Westerfold).
SMALL_DISTRICTS = {"WF01": "Alderbank", "WF02": "Brimcote", "WF03": "Corvale", "WF04": "Dunfarrow"}
#: The 18 five-year bands 0-4 .. 85+ of config/pipeline.yaml (summaries.age_bands).
AGE_BANDS = [f"{low}-{low + 4}" for low in range(0, 85, 5)] + ["85+"]


def write_region(config_dir: Path, population: int = 100) -> None:
    """Write districts.csv (WF01..WF04) and population.csv (every band, F and M) under regions/."""
    regions = config_dir / "regions"
    shutil.rmtree(regions, ignore_errors=True)
    regions.mkdir(parents=True)
    lines = ["district_code,district_name"] + [f"{c},{n}" for c, n in SMALL_DISTRICTS.items()]
    (regions / "districts.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    rows = ["district_code,sex,age_band,population"]
    for code in SMALL_DISTRICTS:
        for sex in ("F", "M"):
            rows += [f"{code},{sex},{band},{population}" for band in AGE_BANDS]
    (regions / "population.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")


def edit_pipeline_yaml(config_dir: Path, section: str, key: str, value: object) -> None:
    """Set one key of config_dir/pipeline.yaml (comments are lost; the copy is throw-away)."""
    path = config_dir / "pipeline.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data.setdefault(section, {})[key] = value
    path.write_text(yaml.safe_dump(data, sort_keys=False, allow_unicode=True), encoding="utf-8")


def make_small_config(target: Path, max_rejection_rate: float = 1.0) -> Path:
    """Copy config/ to ``target`` with the small region and the given rejection gate."""
    shutil.copytree(CONFIG_DIR, target, ignore=shutil.ignore_patterns("regions"))
    write_region(target)
    edit_pipeline_yaml(target, "quality_gate", "max_rejection_rate", max_rejection_rate)
    # the unmapped sex/unit gate goes with the rejection gate (off at 1.0, so defects are rows)
    edit_pipeline_yaml(target, "quality_gate", "max_unmapped_share", max_rejection_rate)
    # Great Expectations costs seconds per run: its suites are tested in test_quality.py and in
    # the integration tests, which use the shipped config
    edit_pipeline_yaml(target, "quality_gate", "great_expectations", False)
    return target


@pytest.fixture
def small_config(tmp_path: Path) -> Path:
    """A copy of config/ with a four-district region and the quality gate off (rate 1.0)."""
    return make_small_config(tmp_path / "config")


#: The months of the shipped samples that the shared sample warehouse holds.
SAMPLE_PERIODS = ("2026-09", "2026-10")


@pytest.fixture(scope="session")
def sample_warehouse(tmp_path_factory) -> Path:
    """The shipped samples run for two months (SAMPLE_PERIODS) into one warehouse, once per
    session, with the shipped config (Great Expectations off: its suites are tested elsewhere
    and cost seconds). Read-only for every test that uses it: open it ``read_only=True``, or
    copy what a test changes."""
    from pipeline.run.flows import run_month_plain

    base = tmp_path_factory.mktemp("samples")
    config = base / "config"
    shutil.copytree(CONFIG_DIR, config)
    edit_pipeline_yaml(config, "quality_gate", "great_expectations", False)
    for period in SAMPLE_PERIODS:
        run_month_plain(
            period, str(config), str(ROOT / "sample_extracts"), str(base / "out"), demo=True
        )
    return base / "out" / "surveillance.duckdb"


def write_inbox(tmp_path: Path, files: dict[str, str | bytes], name: str = "inbox") -> Path:
    """Write ``{relative path: content}`` under ``tmp_path/name``; return the inbox folder.

    ``str`` content is written as UTF-8 exactly as given (no newline added); ``bytes`` as is.
    """
    inbox = tmp_path / name
    inbox.mkdir(parents=True, exist_ok=True)
    for rel, content in files.items():
        path = inbox / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8", newline="")
    return inbox


def run_month(
    config_dir: Path, inbox: Path, out: Path, period: str = "2026-01"
) -> duckdb.DuckDBPyConnection:
    """Run the month without Prefect (demo key) and open ``<out>/surveillance.duckdb`` read-only.

    Close the connection (``with run_month(...) as con:``) before running into the same ``out``
    again: DuckDB refuses a read-write connection to a file open read-only in the same process.
    """
    from pipeline.run.flows import run_month_plain

    run_month_plain(period, str(config_dir), str(inbox), str(out), demo=True)
    return duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)


def rows(con: duckdb.DuckDBPyConnection, query: str, params: list | None = None) -> list[tuple]:
    """All rows of a query (always fetchall: a half-read result blocks the next ``con.sql``)."""
    return con.execute(query, params or []).fetchall()
