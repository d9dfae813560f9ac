"""The quality gate's settings (quality_gate in config/pipeline.yaml): when Data Docs are built.

No Great Expectations needed: only pipeline.core.settings is exercised.
"""

from __future__ import annotations

import pytest

from pipeline.core.errors import ConfigError
from pipeline.core.settings import load_settings
from tests.conftest import edit_pipeline_yaml


@pytest.mark.parametrize("choice", ["on_failure", "always", "never"])
def test_data_docs_choices_load(small_config, choice):
    edit_pipeline_yaml(small_config, "quality_gate", "quality_pages", choice)
    assert load_settings(small_config).pipeline.quality_gate.quality_pages == choice


def test_data_docs_defaults_to_on_failure(small_config):
    assert load_settings(small_config).pipeline.quality_gate.quality_pages == "on_failure"


# true/false (YAML also reads yes/no/on/off so) no longer say when: a clear error, not a guess
@pytest.mark.parametrize("value", [True, False, "sometimes", 1])
def test_data_docs_other_values_are_refused_with_the_choices(small_config, value):
    edit_pipeline_yaml(small_config, "quality_gate", "quality_pages", value)
    with pytest.raises(ConfigError) as info:
        load_settings(small_config)
    message = str(info.value)
    assert "pipeline.yaml: key 'quality_gate.quality_pages'" in message
    assert "on_failure" in message and "always" in message and "never" in message
    assert repr(value) in message


def test_the_old_chunk_rows_key_is_named_as_unknown(small_config):
    edit_pipeline_yaml(small_config, "quality_gate", "chunk_rows", 500000)
    with pytest.raises(ConfigError, match="key 'quality_gate.chunk_rows': unknown key"):
        load_settings(small_config)
