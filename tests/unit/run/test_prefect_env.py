"""Tests for pipeline.run.prefect_env: the environment Prefect starts in.

Outside facts: ``DO_NOT_TRACK=1`` is the cross-tool convention for opting out of telemetry
(consoledonottrack.com, common practice); Prefect reads its settings from ``PREFECT_*``
environment variables (Prefect documentation, "Settings"); a value the user set wins.
"""

from __future__ import annotations

import os

from pipeline.run.prefect_env import DEFAULTS, configure


def test_the_defaults_are_set_where_nothing_is(monkeypatch, tmp_path):
    for name in [*DEFAULTS, "PREFECT_HOME"]:
        monkeypatch.delenv(name, raising=False)
    monkeypatch.chdir(tmp_path)
    configure()
    assert os.environ["DO_NOT_TRACK"] == "1"
    assert os.environ["PREFECT_SERVER_ANALYTICS_ENABLED"] == "false"
    assert int(os.environ["PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS"]) >= 30
    assert os.environ["PREFECT_HOME"] == str(tmp_path / ".prefect")


def test_a_value_already_set_wins_and_verbose_shows_info(monkeypatch):
    monkeypatch.setenv("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "999")
    monkeypatch.setenv("PREFECT_HOME", "/somewhere/else")
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "ERROR")
    configure(verbose=True)
    assert os.environ["PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS"] == "999"
    assert os.environ["PREFECT_HOME"] == "/somewhere/else"
    assert os.environ["PREFECT_LOGGING_LEVEL"] == "INFO"
