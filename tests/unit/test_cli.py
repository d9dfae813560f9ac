"""The command line: help, exit codes, `sources check` on every configured source's samples."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.core.settings import load_settings

REPO = Path(__file__).resolve().parents[2]
SETTINGS = load_settings(REPO / "config")
runner = CliRunner()


def _listed_commands(output: str) -> list[str]:
    """The command names of a help page's "Commands:" section (first word of each entry)."""
    lines = output.splitlines()
    start = next(i for i, line in enumerate(lines) if line.strip() == "Commands:")
    names = []
    for line in lines[start + 1 :]:
        if not line.strip():
            break
        if line.startswith("  ") and not line.startswith("   "):  # an entry, not a wrapped line
            names.append(line.split()[0])
    return names


def test_help_lists_the_commands():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0
    # the names themselves, not a word that happens to appear in a description
    assert {"run", "demo", "backfill", "reprocess", "schedule", "sources"} <= set(
        _listed_commands(result.output)
    )
    sources = runner.invoke(app, ["sources", "--help"])
    assert {"check", "list"} <= set(_listed_commands(sources.output))


def test_flags_are_shown_as_flags():
    """``--verbose`` and ``--help`` take no value, so their help line shows none."""
    result = runner.invoke(app, ["run", "--help"])
    assert result.exit_code == 0
    assert "<bool>" not in result.output
    assert "--verbose" in result.output


def test_version_prints_the_installed_version():
    from importlib.metadata import version

    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0
    assert result.output.strip() == f"kidneysurv {version('kidneysurv')}"


def test_sources_list_names_every_configured_source():
    result = runner.invoke(app, ["sources", "list", "--config", str(REPO / "config")])
    assert result.exit_code == 0, result.output
    for source in SETTINGS.sources:
        assert source.id in result.output
    assert f"{len(SETTINGS.sources)} sources" in result.output


def test_sources_list_with_a_bad_config_folder_says_so(tmp_path):
    result = runner.invoke(app, ["sources", "list", "--config", str(tmp_path / "nowhere")])
    assert result.exit_code == 2


@pytest.mark.parametrize("source", SETTINGS.sources, ids=lambda s: s.id)
def test_every_source_has_samples_that_read_cleanly(source):
    """A new source is one YAML file plus samples: picked up here by glob, no new test code."""
    files = sorted((REPO / "sample_extracts" / source.folder).glob(source.file_glob))
    assert files, f"no sample extract for {source.id}"
    result = runner.invoke(app, ["sources", "check", source.id, str(files[0]),
                                 "--config", str(REPO / "config")])  # fmt: skip
    # the samples carry deliberate defects (sample_extracts/answer_key): an unmapped code makes
    # the check exit 1, a whole-file fault would say "file held back"
    assert result.exit_code in (0, 1), result.output
    assert "file held back" not in result.output
    assert "rows read" in result.output and "accepted" in result.output


def test_sources_check_shows_reasons_with_file_and_line(tmp_path):
    path = tmp_path / "results_2026-01.csv"
    path.write_text(
        "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status\n"
        "T1,1960,F,WF01,S1,2026-01-10,2160-0,see note,mg/dL,final\n"
        "T2,1960,F,WF01,S2,2026-01-10,2160-0,1.0,mg/dL,final\n",
        encoding="utf-8",
    )
    result = runner.invoke(app, ["sources", "check", "westerfold_general_lab", str(path),
                                 "--config", str(REPO / "config")])  # fmt: skip
    assert result.exit_code == 1, result.output  # 1 of 2 rows rejected: a run would hold it back
    assert "not_numeric" in result.output and "would be held back" in result.output
    assert f"{path}:2:" in result.output


def test_sources_check_names_a_whole_file_fault(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("person_token;birth_year\nT1;1960\n", encoding="utf-8")
    result = runner.invoke(app, ["sources", "check", "westerfold_general_lab", str(path),
                                 "--config", str(REPO / "config")])  # fmt: skip
    assert result.exit_code == 1
    assert "bad.csv" in result.output and "delimiter" in result.output


def test_bad_period_is_a_usage_error():
    result = runner.invoke(app, ["run", "--period", "2026-13", "--config", str(REPO / "config")])
    assert result.exit_code == 2
    assert "YYYY-MM" in result.output


def test_run_without_key_refuses_to_start(tmp_path, monkeypatch):
    monkeypatch.delenv("KIDNEYSURV_PSEUDONYM_KEY", raising=False)
    result = runner.invoke(
        app,
        [
            "run",
            "--period",
            "2026-10",
            "--config",
            str(REPO / "config"),
            "--inbox",
            str(REPO / "sample_extracts"),
            "--out",
            str(tmp_path),
        ],
    )
    assert result.exit_code == 2
    assert "KIDNEYSURV_PSEUDONYM_KEY" in result.output
    assert not (tmp_path / "surveillance.duckdb").exists()


def test_config_error_names_file_and_key_without_traceback(tmp_path):
    config = tmp_path / "config"
    shutil.copytree(REPO / "config", config)
    bad = config / "sources" / "westerfold_general_lab.yaml"
    bad.write_text(bad.read_text() + "delimeter: ';'\n")
    result = runner.invoke(app, ["run", "--period", "2026-10", "--config", str(config)])
    assert result.exit_code == 2
    assert "westerfold_general_lab.yaml" in result.output and "delimeter" in result.output
    assert "Traceback" not in result.output


def test_sources_check_names_an_unreadable_file(tmp_path, monkeypatch):
    path = tmp_path / "results_2026-01.csv"
    path.write_text("person_token\n", encoding="utf-8")

    def denied(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(
        "pipeline.run.source_checks.sha256_of", denied
    )  # root can read a mode-0 file
    result = runner.invoke(app, ["sources", "check", "westerfold_general_lab", str(path),
                                 "--config", str(REPO / "config")])  # fmt: skip
    assert result.exit_code == 1
    assert "results_2026-01.csv" in result.output and "Permission denied" in result.output
    assert "Traceback" not in result.output


def test_progress_takes_one_of_its_modes():
    for command in ("run", "demo", "backfill"):
        result = runner.invoke(app, [command, "--help"])
        assert "--progress" in result.output, command
    bad = runner.invoke(app, ["run", "--period", "2026-10", "--progress", "fancy",
                              "--config", str(REPO / "config")])  # fmt: skip
    assert bad.exit_code == 2
    assert "fancy" in bad.output


def test_a_suppressed_headline_count_reads_suppressed_not_zero():
    """The published all-district prevalence row with its CKD count blanked by the disclosure
    step (null): the run's printed headline must not show 0 persons with CKD (common practice:
    a suppressed cell is shown as suppressed, never as a number)."""
    from pipeline.cli import headline_lines

    lines = headline_lines({"persons_tested_12m": 3432, "persons_confirmed_ckd": None,
                            "ckd_share_of_tested": None, "persons_with_diabetes": 323,
                            "diabetes_with_egfr_and_acr": 143,
                            "diabetes_share_with_both": 0.4427})  # fmt: skip
    assert lines == [
        "  tested in the last 12 months: 3,432; confirmed CKD: suppressed",
        "  people with diabetes: 323; with both eGFR and ACR in 12 months: 143 (44.3%)",
    ]
    assert headline_lines({}) == []  # no published prevalence row: nothing printed
