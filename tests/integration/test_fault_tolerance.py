"""Fault tolerance of the monthly run, tested by making the faults happen.

- Atomic months: the run is killed with SIGKILL (``pipeline.core.faults``: ``KIDNEYSURV_FAULT_AT``)
  at several points. Killed before its commit, it leaves the warehouse and the published exports
  exactly as they were (every table compared row by row, every exported file by sha256); killed
  after it, the next run finishes the publication. Either way the next run gives the tables and
  exports of a run that was never interrupted.
- One run at a time: a second run on the same output folder, in this process or from the CLI
  (exit code 3), is refused while the first holds the lock, and the first then ends as usual.
- A full disk while writing the exports (a size-limited tmpfs when this machine lets the test
  mount one, else an injected ENOSPC) changes nothing.
- Idempotent: the same period run twice gives byte-identical CSV and Parquet exports.
- Faulty files (permission denied, an I/O error, not UTF-8, a truncated Patient.ndjson, a file
  refused by the identifier screen) are held back with a message naming the file; the other
  files and sources publish. A truncated last NDJSON record is a rejected row, not a lost file.
- SQL safety: names from config are checked against a plain-identifier pattern, and hostile
  text in the data is stored as data.

The guarantees are those of DEVELOPERS.md, Design notes ("Atomic", "Deterministic") and DEVELOPERS.md (Threat
model). SIGKILL, flock and tmpfs behave as POSIX/Linux document them (common practice).
All data are invented (Westerfold).
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import duckdb
import pytest
import yaml

from pipeline.core.errors import ConfigError
from pipeline.core.pseudonymise import DEMO_KEY
from pipeline.core.settings import IDENTIFIER_PATTERN, load_settings
from pipeline.run.flows import run_month_plain
from pipeline.run.runlock import RunLocked, recover_interrupted_run, run_lock
from pipeline.warehouse.catalog import PUBLISHED_TABLES
from pipeline.warehouse.connection import WAREHOUSE_FILE
from pipeline.warehouse.sql import build_table, replace_period_frame
from tests.conftest import make_small_config, rows, write_inbox

ROOT = Path(__file__).resolve().parents[2]
PERIOD = "2026-01"
#: January is run again after a late file: a revision of the published month (README, "Corrections")
REASON = "a late January file"
LAB = "westerfold_general_lab"
HEADER = ("person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,"
          "status,height_cm,reported_at,fasting\n")  # fmt: skip
#: The run under test, in a child process: ``python -c CHILD root period config inbox out``.
CHILD = ("import sys; sys.path.insert(0, sys.argv[1]); from pipeline.run.flows import run_month_plain; "
         "run_month_plain(sys.argv[2], sys.argv[3], sys.argv[4], sys.argv[5], demo=True, "
         "revise='a late January file')")  # fmt: skip
#: Killed here, the run has not committed: everything must be as before it.
BEFORE_COMMIT = ["ingest:after", "summarise:after", "export:after", "publish:journal"]
#: Killed here, the month is committed: the next run (or recovery) completes the publication.
AFTER_COMMIT = ["publish:committed", "publish:moved"]
#: What a finished run leaves hidden in the output folder (the lock file, DuckDB's spill folder).
HIDDEN_OK = {".run.lock", ".duckdb_tmp"}


def results_csv(first: int, count: int, specimen_prefix: str) -> str:
    """Standard-layout rows for invented persons: one creatinine each, some an ACR too."""
    lines = []
    for p in range(first, first + count):
        day = 1 + p % 28
        sex = "FM"[p % 2]
        lines.append(f"WF-{p:08x},{1940 + p % 50},{sex},WF0{1 + p % 4},{specimen_prefix}{p:05d},"
                     f"2026-01-{day:02d},2160-0,{0.6 + (p % 23) / 10:.2f},mg/dL,final,,2026-01-{day:02d},\n")  # fmt: skip
        if p % 3 == 0:
            lines.append(f"WF-{p:08x},{1940 + p % 50},{sex},WF0{1 + p % 4},{specimen_prefix}U{p:05d},"
                         f"2026-01-{day:02d},9318-7,{5 + (p % 40) * 3},mg/g,final,,2026-01-{day:02d},\n")  # fmt: skip
    return HEADER + "".join(lines)


# --------------------------------------------------------------------------- state of an output folder


def warehouse_dump(out: Path, across_runs: bool = False) -> dict[str, str]:
    """sha256 of every table (its columns and all its rows, ordered), by schema.table.

    ``across_runs`` leaves out what differs between two runs by design: the ``runs`` table (run
    id, start time, durations) and ``ingest_files.ingested_at`` and ``file_stat`` (wall time,
    and the inbox file's inode and times; DEVELOPERS.md).
    """
    con = duckdb.connect(str(out / WAREHOUSE_FILE), read_only=True)
    try:
        tables = rows(con, "select schema_name, table_name from duckdb_tables() "
                           "where database_name = current_database() order by all")  # fmt: skip
        dump = {}
        for schema, table in tables:
            if across_runs and (schema, table) == ("main", "runs"):
                continue
            columns = rows(con, "select column_name, data_type from duckdb_columns() "
                                "where schema_name = ? and table_name = ? order by column_index",
                           [schema, table])  # fmt: skip
            if across_runs and (schema, table) == ("main", "ingest_files"):
                columns = [c for c in columns if c[0] not in ("ingested_at", "file_stat")]
            select = ", ".join(f'"{c}"' for c, _ in columns)
            data = rows(con, f'select {select} from "{schema}"."{table}" order by all')
            dump[f"{schema}.{table}"] = hashlib.sha256(repr((columns, data)).encode()).hexdigest()
        return dump
    finally:
        con.close()


def published_files(out: Path, tables_only: bool = False) -> dict[str, str]:
    """sha256 of every file in the published period folders (``tables_only``: CSV and Parquet)."""
    found = {}
    for folder in sorted(p for p in out.iterdir() if p.is_dir() and not p.name.startswith(".")):
        for path in sorted(folder.rglob("*")):
            if path.is_file() and (not tables_only or path.suffix in (".csv", ".parquet")):
                found[path.relative_to(out).as_posix()] = hashlib.sha256(
                    path.read_bytes()
                ).hexdigest()
    return found


def leftovers(out: Path) -> set[str]:
    return {p.name for p in out.iterdir() if p.name.startswith(".")} - HIDDEN_OK


@dataclass
class Scenario:
    config: Path
    inbox: Path
    before: Path  # January published from the first file
    reference: Path  # then the late file arrived and January was run again, uninterrupted
    before_full: dict[str, str]
    before_files: dict[str, str]
    reference_dump: dict[str, str]
    reference_tables: dict[str, str]


@pytest.fixture(scope="module")
def scenario(tmp_path_factory) -> Scenario:
    base = tmp_path_factory.mktemp("crash")
    config = make_small_config(base / "config")
    inbox = write_inbox(base, {f"{LAB}/results_{PERIOD}.csv": results_csv(0, 60, "WGH")})
    before = base / "before"
    run_month_plain(PERIOD, str(config), str(inbox), str(before), demo=True, revise=REASON)
    # the run under test: a late file for the same month arrives and January is run again
    write_inbox(base, {f"{LAB}/results_{PERIOD}_late.csv": results_csv(60, 40, "LATE")})
    reference = base / "reference"
    shutil.copytree(before, reference)
    run_month_plain(PERIOD, str(config), str(inbox), str(reference), demo=True, revise=REASON)
    s = Scenario(config, inbox, before, reference, warehouse_dump(before), published_files(before),
                 warehouse_dump(reference, across_runs=True), published_files(reference, tables_only=True))  # fmt: skip
    # the late file changes the published tables, so "as before" and "as the reference" differ
    assert s.reference_tables != published_files(before, tables_only=True)
    return s


def child(s: Scenario, out: Path, **env: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-c", CHILD, str(ROOT), PERIOD, str(s.config), str(s.inbox), str(out)],
        env={**os.environ, **env}, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
    )  # fmt: skip


def assert_as_reference(s: Scenario, out: Path) -> None:
    assert warehouse_dump(out, across_runs=True) == s.reference_dump
    assert published_files(out, tables_only=True) == s.reference_tables
    assert not leftovers(out), leftovers(out)


# --------------------------------------------------------------------------- atomic months


#: Several runs killed at their points, in parallel: a child process imports the flow once (the
#: import takes seconds), then forks one process per point, which runs the month with
#: ``KIDNEYSURV_FAULT_AT`` set and is killed there; the child prints each one's exit code.
KILLER = """
import json, os, sys
sys.path.insert(0, sys.argv[1])
from pipeline.run.flows import run_month_plain
period, config, inbox, jobs = sys.argv[2], sys.argv[3], sys.argv[4], json.loads(sys.argv[5])
started = {}
for point, out in jobs.items():
    pid = os.fork()
    if pid == 0:
        os.environ["KIDNEYSURV_FAULT_AT"] = point
        try:
            run_month_plain(period, config, inbox, out, demo=True, revise="a late January file")
        except BaseException as exc:
            print(f"{point}: {exc!r}", file=sys.stderr)
            os._exit(1)
        os._exit(0)
    started[pid] = point
codes = {}
while started:
    pid, status = os.wait()
    codes[started.pop(pid)] = os.waitstatus_to_exitcode(status)
print(json.dumps(codes))
"""


@pytest.fixture(scope="module")
def killed(scenario: Scenario, tmp_path_factory) -> dict[str, Path]:
    """One copy of the output folder per kill point, each run killed there."""
    base = tmp_path_factory.mktemp("killed")
    jobs = {}
    for point in BEFORE_COMMIT + AFTER_COMMIT:
        out = base / point.replace(":", "_")
        shutil.copytree(scenario.before, out)
        jobs[point] = str(out)
    done = subprocess.run(
        [sys.executable, "-c", KILLER, str(ROOT), PERIOD, str(scenario.config), str(scenario.inbox),
         json.dumps(jobs)], capture_output=True, text=True, timeout=300,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr[-3000:]
    codes = json.loads(done.stdout.strip().splitlines()[-1])
    for point in jobs:
        assert codes[point] == -signal.SIGKILL, (
            f"the run was not killed at {point!r} (exit {codes[point]}): is maybe_fail({point!r}) "
            f"in place?\n{done.stderr[-2000:]}"
        )
    return {point: Path(out) for point, out in jobs.items()}


@pytest.mark.parametrize("point", BEFORE_COMMIT)
def test_killed_before_the_commit_leaves_everything_as_before(scenario, killed, point):
    out = killed[point]
    assert published_files(out) == scenario.before_files  # every exported file, byte for byte
    assert warehouse_dump(out) == scenario.before_full  # every table, the ledger and runs included


@pytest.mark.parametrize("point", BEFORE_COMMIT)
def test_after_a_kill_before_the_commit_the_next_run_is_as_uninterrupted(scenario, killed, point):
    out = killed[point]
    run_month_plain(
        PERIOD, str(scenario.config), str(scenario.inbox), str(out), demo=True, revise=REASON
    )
    assert_as_reference(scenario, out)


@pytest.mark.parametrize("point", AFTER_COMMIT)
def test_killed_after_the_commit_the_month_is_committed_and_recovery_publishes_it(
    scenario, killed, point
):
    out = killed[point]
    assert warehouse_dump(out, across_runs=True) == scenario.reference_dump
    # the exports still being installed: the previous ones, or none while they are moved aside
    current = published_files(out, tables_only=True)
    if point == "publish:committed":
        assert current == published_files(scenario.before, tables_only=True)
    journal = json.loads((out / f".{PERIOD}.publishing.json").read_text(encoding="utf-8"))
    with run_lock(out):
        con = duckdb.connect(str(out / WAREHOUSE_FILE))
        try:
            assert rows(con, "select count(*) from runs where run_id = ?", [journal["run_id"]]) == [
                (1,)
            ]
            done = recover_interrupted_run(out, con)
        finally:
            con.close()
    assert any("after its commit" in line for line in done), done
    assert published_files(out, tables_only=True) == scenario.reference_tables
    # recovery put the killed run's own exports in place (nothing was recomputed)
    manifest = json.loads((out / PERIOD / "run_manifest.json").read_text(encoding="utf-8"))
    assert manifest["run_id"] == journal["run_id"]
    run_month_plain(
        PERIOD, str(scenario.config), str(scenario.inbox), str(out), demo=True, revise=REASON
    )
    assert_as_reference(scenario, out)


# --------------------------------------------------------------------------- idempotent


def test_same_period_twice_gives_byte_identical_exports(scenario, tmp_path):
    out = tmp_path / "again"
    shutil.copytree(scenario.reference, out)
    run_month_plain(
        PERIOD, str(scenario.config), str(scenario.inbox), str(out), demo=True, revise=REASON
    )
    assert (
        published_files(out, tables_only=True) == scenario.reference_tables
    )  # sha256 of CSV and Parquet
    assert warehouse_dump(out, across_runs=True) == scenario.reference_dump
    assert len(scenario.reference_tables) == 2 * 2 * len(
        PUBLISHED_TABLES
    )  # CSV + Parquet, revision 2 and 1


# --------------------------------------------------------------------------- one run at a time


def _stopped(pid: int) -> bool:
    with open(f"/proc/{pid}/stat", encoding="ascii") as fh:
        return fh.read().rsplit(")", 1)[1].split()[0] == "T"


def test_a_second_concurrent_run_is_refused_and_does_no_harm(scenario, tmp_path):
    out = tmp_path / "busy"
    shutil.copytree(scenario.before, out)
    first = child(scenario, out, KIDNEYSURV_FAULT_AT="ingest:after", KIDNEYSURV_FAULT_KIND="stop")
    try:
        deadline = time.monotonic() + 120
        while not _stopped(first.pid):
            assert first.poll() is None, (
                "the first run ended before pausing: is maybe_fail('ingest:after') in place?"
            )
            assert time.monotonic() < deadline, "the first run did not reach ingest:after"
            time.sleep(0.1)
        # the first run holds the lock, in the middle of its transaction
        with pytest.raises(RunLocked) as refused:
            run_month_plain(
                PERIOD,
                str(scenario.config),
                str(scenario.inbox),
                str(out),
                demo=True,
                revise=REASON,
            )
        message = str(refused.value)
        assert (
            str(out) in message and f"pid {first.pid}" in message and "changed nothing" in message
        )
        cli = subprocess.run(
            [sys.executable, "-c", "import sys; sys.path.insert(0, sys.argv[1]); from pipeline.cli import app; "
             "sys.argv[1:2] = []; app()", str(ROOT), "run", "--period", PERIOD, "--config", str(scenario.config),
             "--inbox", str(scenario.inbox), "--out", str(out)],
            env={**os.environ, "KIDNEYSURV_PSEUDONYM_KEY": DEMO_KEY}, capture_output=True, text=True, timeout=120,
        )  # fmt: skip
        assert cli.returncode == 3, cli.stdout + cli.stderr
        assert "another kidneysurv run" in " ".join(cli.stderr.split())
        assert published_files(out) == scenario.before_files
    finally:
        if first.poll() is None:
            os.kill(first.pid, signal.SIGCONT)
        try:
            first.communicate(timeout=180)
        except subprocess.TimeoutExpired:
            first.kill()
            first.communicate()
    assert first.returncode == 0
    assert_as_reference(scenario, out)


# --------------------------------------------------------------------------- disk full


def _mount_small_disk(where: Path, size_bytes: int) -> bool:
    where.mkdir(exist_ok=True)
    try:
        done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_bytes},mode=0700", "tmpfs", str(where)],
                              capture_output=True, timeout=30)  # fmt: skip
    except (OSError, subprocess.SubprocessError):
        return False
    return done.returncode == 0


@pytest.mark.parametrize("how", ["small_disk", "injected"])
def test_disk_full_while_writing_exports_changes_nothing(scenario, tmp_path, monkeypatch, how):
    """``small_disk``: the output folder on a tmpfs filled up to a few kB, when this machine lets
    the test mount one (root with CAP_SYS_ADMIN), else an ENOSPC injected when the exports start;
    ``injected``: ENOSPC injected once the exports are written (the disk fills at the last file)."""
    disk = tmp_path / "disk"
    size = sum(p.stat().st_size for p in scenario.before.rglob("*") if p.is_file())
    mounted = how == "small_disk" and _mount_small_disk(disk, size + (8 << 20))
    try:
        out = (disk if mounted else tmp_path) / "out"
        shutil.copytree(scenario.before, out)
        ballast = disk / "ballast"
        if mounted:  # fill the disk, leaving less than the exports need
            free = os.statvfs(disk).f_bavail * os.statvfs(disk).f_frsize
            with ballast.open("wb") as fh:
                fh.write(b"\0" * max(free - (12 << 10), 0))
        else:
            monkeypatch.setenv(
                "KIDNEYSURV_FAULT_AT", "export:before" if how == "small_disk" else "export:after"
            )
            monkeypatch.setenv("KIDNEYSURV_FAULT_KIND", "enospc")
        with pytest.raises(Exception) as full:
            run_month_plain(
                PERIOD,
                str(scenario.config),
                str(scenario.inbox),
                str(out),
                demo=True,
                revise=REASON,
            )
        assert (
            "No space left on device" in str(full.value)
            or getattr(full.value, "errno", None) == errno.ENOSPC
        )
        if mounted:  # the message names the export file being written
            assert str(out / f".{PERIOD}.partial") in str(full.value), str(full.value)
        assert published_files(out) == scenario.before_files
        assert warehouse_dump(out) == scenario.before_full
        if mounted:
            ballast.unlink()
        monkeypatch.delenv("KIDNEYSURV_FAULT_AT", raising=False)
        run_month_plain(
            PERIOD, str(scenario.config), str(scenario.inbox), str(out), demo=True, revise=REASON
        )
        assert_as_reference(scenario, out)
    finally:
        if mounted:
            subprocess.run(["umount", str(disk)], capture_output=True, timeout=30)


# --------------------------------------------------------------------------- faulty files


@dataclass
class FaultyRun:
    inbox: Path
    out: Path
    summary: dict
    ledger: dict[str, tuple[str, str | None, int]]


FHIR_LAB = "fallowmere_reference_lab"
CORVALE = "corvale_lab_chain"
PATIENT = ('{"resourceType":"Patient","id":"fr-%d","identifier":[{"system":"urn:westerfold:linkage-token",'
           '"value":"WF-f%07d"}],"gender":"female","birthDate":"1961","address":[{"district":"Alderbank"}]}\n')  # fmt: skip
OBSERVATION = ('{"resourceType":"Observation","id":"o%d","status":"final","code":{"coding":[{"system":'
               '"http://loinc.org","code":"2160-0"}]},"subject":{"reference":"Patient/fr-%d"},"specimen":'
               '{"reference":"Specimen/FR%d"},"effectiveDateTime":"2026-01-12","issued":"2026-01-13",'
               '"valueQuantity":{"value":1.1,"unit":"mg/dL","system":"http://unitsofmeasure.org","code":"mg/dL"}}\n')  # fmt: skip
CORVALE_HEADER = "PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate\n"
HOSTILE = "S1'); drop table lab_results; --"


@pytest.fixture(scope="module")
def faulty(tmp_path_factory) -> FaultyRun:
    base = tmp_path_factory.mktemp("faulty")
    config = make_small_config(base / "config")
    good_fhir = (
        "".join(PATIENT % (i, i) for i in range(3)),
        "".join(OBSERVATION % (i, i, i) for i in range(3)),
    )
    corvale_row = "WF-c0000001;1970;F;WF02;CV-1;10/01/2026;CREA;88,4;µmol/l;F;11/01/2026\n"
    inbox = write_inbox(base, {
        f"{LAB}/results_{PERIOD}.csv": results_csv(0, 20, "WGH").replace("WGH00001", HOSTILE, 1),
        f"{LAB}/results_{PERIOD}_contacts.csv": HEADER.replace("\n", ",email\n")
        + "WF-00000099,1970,F,WF01,S9,2026-01-05,2160-0,1.0,mg/dL,final,,2026-01-06,,m.holloway@example.invalid\n",
        f"{CORVALE}/export_202601.csv": CORVALE_HEADER + corvale_row,
        f"{CORVALE}/export_202601_denied.csv": CORVALE_HEADER + corvale_row.replace("CV-1", "CV-2"),
        f"{CORVALE}/export_202601_io.csv": CORVALE_HEADER + corvale_row.replace("CV-1", "CV-3"),
        f"{CORVALE}/export_202601_corrupt.csv": b"PatientRef;Year\xff\xfe\x00\x81garbage\x00\x00",
        f"{FHIR_LAB}/2026-01/Patient.ndjson": good_fhir[0],
        f"{FHIR_LAB}/2026-01/Observation.ndjson": good_fhir[1] + (OBSERVATION % (7, 1, 7))[:90],
        f"{FHIR_LAB}/2026-01b/Patient.ndjson": good_fhir[0][:150],  # cut in the middle of a record
        f"{FHIR_LAB}/2026-01b/Observation.ndjson": OBSERVATION % (8, 0, 8),
    })  # fmt: skip
    denied = inbox / CORVALE / "export_202601_denied.csv"
    failing = {denied: (errno.EACCES, "Permission denied"),
               inbox / CORVALE / "export_202601_io.csv": (errno.EIO, "Input/output error")}  # fmt: skip
    denied.chmod(0)
    real_open = Path.open

    def open_(self: Path, *args, **kwargs):
        if self in failing and (self != denied or os.geteuid() == 0):  # root reads a mode-0 file
            code, text = failing[self]
            raise OSError(code, text, str(self))
        return real_open(self, *args, **kwargs)

    out = base / "out"
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(Path, "open", open_)
        summary = run_month_plain(
            PERIOD, str(config), str(inbox), str(out), demo=True, revise=REASON
        )
    denied.chmod(0o600)
    con = duckdb.connect(str(out / WAREHOUSE_FILE), read_only=True)
    try:
        ledger = {
            p: (s, m, n)
            for p, s, m, n in rows(
                con, "select file_path, status, message, rows_read from ingest_files"
            )
        }
        assert rows(con, "select count(*) from lab_results where specimen_id = ?", [HOSTILE]) == [
            (1,)
        ]
    finally:
        con.close()
    return FaultyRun(inbox, out, summary, ledger)


@pytest.mark.parametrize(("rel", "says"), [
    (f"{CORVALE}/export_202601_denied.csv", "Permission denied"),
    (f"{CORVALE}/export_202601_io.csv", "Input/output error"),
    (f"{CORVALE}/export_202601_corrupt.csv", "bytes that are not utf-8"),
    (f"{FHIR_LAB}/2026-01b/Observation.ndjson", "Patient.ndjson: line 1: not valid JSON"),
    (f"{LAB}/results_{PERIOD}_contacts.csv", "column 'email': e-mail addresses"),
])  # fmt: skip
def test_a_faulty_file_is_held_back_naming_the_file(faulty, rel, says):
    status, message, _ = faulty.ledger[rel]
    assert status == "held_back"
    assert says in message
    assert (
        str(faulty.inbox / rel.rsplit("/", 1)[0]) in message
    )  # the file (or its Patient.ndjson) is named
    assert faulty.summary["held_back_files"][rel] == message
    assert "m.holloway" not in message  # the screen never quotes the value it refused


def test_the_other_files_and_sources_publish(faulty):
    for rel in (
        f"{LAB}/results_{PERIOD}.csv",
        f"{CORVALE}/export_202601.csv",
        f"{FHIR_LAB}/2026-01/Observation.ndjson",
    ):
        status, _, read = faulty.ledger[rel]
        assert status == "ingested" and read > 0, rel
    assert (faulty.out / PERIOD / "district_ckd_prevalence.csv").is_file()
    assert (
        faulty.summary["exit_code"] == 1
    )  # held-back files: exit code 1 (DEVELOPERS.md, Design notes, CLI contract)


def test_a_truncated_last_ndjson_record_is_a_rejected_row(faulty):
    con = duckdb.connect(str(faulty.out / WAREHOUSE_FILE), read_only=True)
    try:
        found = rows(con, "select line_no, reason_code from rejected_rows r join ingest_files f using (file_id) "
                          "where f.file_path = ?", [f"{FHIR_LAB}/2026-01/Observation.ndjson"])  # fmt: skip
    finally:
        con.close()
    assert found == [(4, "malformed_record")]


# --------------------------------------------------------------------------- SQL safety


@pytest.mark.parametrize(("where", "value"), [
    ("source id", "lab'; drop table lab_results; --"),
    ("source id", 'lab"; select 1; --'),
    ("district code", "WF01'); drop table lab_results; --"),
])  # fmt: skip
def test_a_config_that_tries_to_inject_sql_is_refused(small_config: Path, where: str, value: str):
    if where == "source id":
        path = small_config / "sources" / "westerfold_general_lab.yaml"
        data = yaml.safe_load(path.read_text(encoding="utf-8"))
        data["id"] = value
        path.write_text(yaml.safe_dump(data), encoding="utf-8")
        expected = "key 'id'"
    else:
        path = small_config / "regions" / "districts.csv"
        path.write_text(path.read_text(encoding="utf-8") + f'"{value}",Evilton\n', encoding="utf-8")
        expected = "is not a plain code"
    with pytest.raises(ConfigError) as refused:
        load_settings(small_config)
    assert str(path) in str(refused.value) and expected in str(refused.value)


def test_table_names_put_into_sql_text_are_checked(tmp_path: Path):
    import polars as pl

    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    try:
        with pytest.raises(ValueError):
            build_table(con, "lab_results", target="x; drop table ingest_files")
        with pytest.raises(ValueError):
            replace_period_frame(con, "t; drop table x", PERIOD, pl.DataFrame({"period": [PERIOD]}))
    finally:
        con.close()
    # the names the export writes into its SQL text come from code, and match the same pattern
    import re

    for table in PUBLISHED_TABLES:
        for name in (table.name, *table.keys):
            assert re.fullmatch(IDENTIFIER_PATTERN, name), name


def test_hostile_text_in_the_data_is_stored_as_data(faulty):
    # the fixture checked that the specimen id with SQL in it is in lab_results, and the run
    # went on after it: lab_results and the ledger are still there
    assert faulty.ledger[f"{LAB}/results_{PERIOD}.csv"][0] == "ingested"
