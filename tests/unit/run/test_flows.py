"""Tests for pipeline.run.flows: the monthly flow is a Prefect flow, and the executor chosen on
the command line replaces the configured one without changing the settings read.

Outside facts: a function decorated with ``prefect.flow`` is a ``prefect.Flow`` whose parameters
are those of the function (Prefect documentation, "Flows"); pydantic's ``model_copy`` returns
a new model and leaves the original unchanged (pydantic documentation, "Models").
"""

from __future__ import annotations

import inspect

import prefect
import pytest
from pydantic import ValidationError

from pipeline.core.settings import load_settings
from pipeline.run.flows import monthly_surveillance, with_executor
from tests.conftest import CONFIG_DIR

SETTINGS = load_settings(CONFIG_DIR)


def test_the_monthly_flow_is_a_prefect_flow_with_the_cli_parameters():
    assert isinstance(monthly_surveillance, prefect.Flow)
    params = inspect.signature(monthly_surveillance.fn).parameters
    assert {"period", "config_dir", "inbox", "out", "demo", "executor"} <= set(params)


@pytest.mark.parametrize("executor", ["local", "shards", "dask"])
def test_the_executor_is_replaced_in_a_copy(executor):
    before = SETTINGS.pipeline.execution.executor
    changed = with_executor(SETTINGS, executor)
    assert changed.pipeline.execution.executor == executor
    assert SETTINGS.pipeline.execution.executor == before
    assert changed.pipeline.measures == SETTINGS.pipeline.measures
    assert with_executor(SETTINGS, None) is SETTINGS


def test_an_unknown_executor_is_refused():
    with pytest.raises(ValidationError):
        with_executor(SETTINGS, "gpu")
