"""Tests for pipeline.core.errors: a broken configuration is a ConfigError naming the file.

Outside fact: YAML 1.2 (yaml.org spec, section 6.1, "Indentation Spaces") forbids tab characters
in indentation, so a pipeline.yaml indented with a tab is not YAML at all.
"""

from __future__ import annotations

import pytest

from pipeline.core.errors import ConfigError
from pipeline.core.settings import load_settings
from tests.conftest import make_small_config


def test_a_config_error_is_an_exception_with_its_message():
    error = ConfigError("config/pipeline.yaml: quality_gate.max_rejection_rate: must be <= 1")
    assert isinstance(error, Exception) and not isinstance(error, ValueError | OSError)
    assert str(error).startswith("config/pipeline.yaml: quality_gate")


def test_a_tab_indented_yaml_file_is_a_config_error_naming_the_file(tmp_path):
    config = make_small_config(tmp_path / "config")
    path = config / "pipeline.yaml"
    path.write_text("quality_gate:\n\tmax_rejection_rate: 0.5\n", encoding="utf-8")  # YAML 1.2 6.1
    with pytest.raises(ConfigError, match="pipeline.yaml"):
        load_settings(config)


def test_a_missing_config_folder_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="nowhere"):
        load_settings(tmp_path / "nowhere")
