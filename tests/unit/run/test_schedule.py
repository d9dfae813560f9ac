"""Schedule settings and the period a scheduled run publishes."""

from __future__ import annotations

import datetime as dt

import pytest

from pipeline.core.errors import ConfigError
from pipeline.core.periods import Period
from pipeline.core.settings import load_settings
from tests.conftest import edit_pipeline_yaml, make_small_config


@pytest.mark.parametrize(("today", "period"), [
    (dt.date(2026, 12, 3), "2026-11"), (dt.date(2027, 1, 3), "2026-12"), (dt.date(2026, 3, 1), "2026-02"),
])  # fmt: skip
def test_a_scheduled_run_publishes_the_previous_month(today, period):
    assert Period.previous_month(today).label == period


@pytest.mark.parametrize(("key", "value", "words"), [
    ("cron", "0 6 3 *", "5 fields"), ("timezone", "Mars/Olympus", "IANA"),
])  # fmt: skip
def test_bad_schedule_settings_are_refused(tmp_path, key, value, words):
    config = make_small_config(tmp_path / "config")
    edit_pipeline_yaml(config, "schedule", key, value)
    with pytest.raises(ConfigError, match=words) as error:
        load_settings(config)
    assert "pipeline.yaml" in str(error.value) and f"schedule.{key}" in str(error.value)
