"""Tests for pipeline.core.settings: the shipped config loads; every kind of mistake in a file gives one
ConfigError naming the file and the key, never a Python traceback."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
import yaml

from pipeline.core.errors import ConfigError
from pipeline.core.settings import load_settings, load_source
from tests.conftest import CONFIG_DIR, SMALL_DISTRICTS


def write_source(config_dir: Path, name: str, data: dict | str) -> Path:
    path = config_dir / "sources" / f"{name}.yaml"
    text = (
        data if isinstance(data, str) else yaml.safe_dump(data, sort_keys=False, allow_unicode=True)
    )
    path.write_text(text, encoding="utf-8")
    return path


def source_data(config_dir: Path, name: str) -> dict:
    return yaml.safe_load((config_dir / "sources" / f"{name}.yaml").read_text(encoding="utf-8"))


def config_error(config_dir: Path) -> str:
    with pytest.raises(ConfigError) as info:
        load_settings(config_dir)
    message = str(info.value)
    assert "Traceback" not in message
    return message


STANDARD = {"id": "test_standard_lab", "layout": "standard", "folder": "test_standard_lab"}
DELIMITED = {
    "id": "test_semicolon_lab",
    "layout": "delimited",
    "folder": "test_semicolon_lab",
    "delimiter": ";",
    "decimal_mark": ",",
    "columns": {
        "person_token": "Ref", "birth_year": "Born", "sex": "Sex", "district_code": "Area",
        "specimen_id": "Sample", "collected_date": "Date", "test_code": "Code", "value": "Result",
        "unit": "Unit", "status": "State",
    },
}  # fmt: skip


# --------------------------------------------------------------------------- what loads


def test_shipped_config_loads():
    if not (CONFIG_DIR / "regions" / "districts.csv").is_file():
        pytest.skip("config/regions/ is not in place yet (it ships with the sample extracts)")
    settings = load_settings(CONFIG_DIR)
    assert settings.sources
    assert settings.districts
    assert {s.id for s in settings.sources} == {
        p.stem for p in (CONFIG_DIR / "sources").glob("*.yaml")
    }


@pytest.mark.parametrize(
    "path", sorted((CONFIG_DIR / "sources").glob("*.yaml")), ids=lambda p: p.stem
)
def test_every_shipped_source_config_loads(path: Path):
    # picked up by glob: a new source config is tested with no new test code (DEVELOPERS.md, Conventions)
    source = load_source(path)
    assert source.id == path.stem


def test_small_config_loads(small_config: Path):
    settings = load_settings(small_config)
    assert settings.districts == SMALL_DISTRICTS
    assert settings.pipeline.quality_gate.max_rejection_rate == 1.0
    # 4 districts x 2 sexes x 18 age bands
    assert len(settings.population) == 4 * 2 * 18


def test_added_standard_and_delimited_sources_load(small_config: Path):
    write_source(small_config, "test_standard_lab", STANDARD)
    write_source(small_config, "test_semicolon_lab", DELIMITED)
    settings = load_settings(small_config)
    assert settings.source("test_semicolon_lab").decimal_mark == ","
    assert settings.source("test_standard_lab").file_glob == "*.csv"


# --------------------------------------------------------------------------- what does not


def test_unknown_key_names_file_and_key(small_config: Path):
    path = write_source(small_config, "test_standard_lab", {**STANDARD, "delimeter": ";"})
    message = config_error(small_config)
    assert str(path) in message
    assert "delimeter" in message
    assert "unknown key" in message


def test_wrong_type(small_config: Path):
    path = write_source(small_config, "test_semicolon_lab", {**DELIMITED, "decimal_mark": 5})
    message = config_error(small_config)
    assert str(path) in message and "decimal_mark" in message


def test_missing_required_key(small_config: Path):
    data = dict(STANDARD)
    del data["layout"]
    path = write_source(small_config, "test_standard_lab", data)
    message = config_error(small_config)
    assert str(path) in message and "layout" in message and "missing" in message


def test_missing_pipeline_file(small_config: Path):
    (small_config / "pipeline.yaml").unlink()
    message = config_error(small_config)
    assert "pipeline.yaml" in message and "not found" in message


def test_missing_source_file():
    with pytest.raises(ConfigError, match="file not found") as info:
        load_source(Path("/nonexistent/sources/nobody.yaml"))
    assert "Traceback" not in str(info.value)


def test_missing_region_file(small_config: Path):
    (small_config / "regions" / "population.csv").unlink()
    assert "population.csv" in config_error(small_config)


def test_invalid_yaml(small_config: Path):
    path = write_source(
        small_config, "test_standard_lab", "id: test_standard_lab\nlayout: [standard\n"
    )
    message = config_error(small_config)
    assert str(path) in message and "not valid YAML" in message


def test_top_level_not_a_mapping(small_config: Path):
    path = write_source(small_config, "test_standard_lab", "- id\n- layout\n")
    assert str(path) in config_error(small_config)


def test_id_differs_from_file_name(small_config: Path):
    path = write_source(small_config, "test_standard_lab", {**STANDARD, "id": "other_lab"})
    message = config_error(small_config)
    assert str(path) in message and "'id'" in message and "other_lab" in message


def test_delimited_source_missing_column_mapping(small_config: Path):
    columns = dict(DELIMITED["columns"])
    del columns["status"]
    path = write_source(small_config, "test_semicolon_lab", {**DELIMITED, "columns": columns})
    message = config_error(small_config)
    assert str(path) in message and "status" in message and "columns" in message


def test_delimited_unknown_standard_field(small_config: Path):
    columns = {**DELIMITED["columns"], "patient_name": "Name"}
    write_source(small_config, "test_semicolon_lab", {**DELIMITED, "columns": columns})
    assert "patient_name" in config_error(small_config)


def test_source_id_with_sql_is_refused(small_config: Path):
    # the id reaches SQL as a value and file names: only plain identifiers are allowed
    path = write_source(small_config, "x", {**STANDARD, "id": "x; drop table lab_results"})
    message = config_error(small_config)
    assert str(path) in message and "'id'" in message


def test_folder_outside_inbox_is_refused(small_config: Path):
    write_source(small_config, "test_standard_lab", {**STANDARD, "folder": "../elsewhere"})
    assert "folder" in config_error(small_config)


def test_status_mapped_to_non_fhir_status(small_config: Path):
    write_source(small_config, "test_semicolon_lab", {**DELIMITED, "status_codes": {"F": "done"}})
    assert "status_codes" in config_error(small_config)


def test_test_code_mapped_to_unlisted_loinc(small_config: Path):
    write_source(
        small_config, "test_semicolon_lab", {**DELIMITED, "test_codes": {"CREA": "0000-0"}}
    )
    message = config_error(small_config)
    assert "test_codes" in message and "0000-0" in message


def test_pipeline_wrong_type_names_nested_key(small_config: Path):
    path = small_config / "pipeline.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data["trajectories"]["decline_min_span_days"] = "four weeks"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    message = config_error(small_config)
    assert "trajectories.decline_min_span_days" in message


def test_population_for_unknown_district(small_config: Path):
    with (small_config / "regions" / "population.csv").open("a", encoding="utf-8") as fh:
        fh.write("WF99,F,0-4,10\n")
    message = config_error(small_config)
    assert "population.csv" in message and "WF99" in message


def test_unknown_source_lookup(small_config: Path):
    settings = load_settings(small_config)
    with pytest.raises(ConfigError, match="unknown source 'nobody'"):
        settings.source("nobody")


def test_clinical_rule_settings_are_checked(small_config: Path):
    from tests.conftest import edit_pipeline_yaml

    # ADA Standards of Care: confirmed (two abnormal results) or single; nothing else
    edit_pipeline_yaml(small_config, "measures", "diabetes_rule", "twice")
    message = config_error(small_config)
    assert "diabetes_rule" in message and "pipeline.yaml" in message
    edit_pipeline_yaml(small_config, "measures", "diabetes_rule", "confirmed")
    # KDIGO 2012: the CKD-by-albuminuria rule follows the A2 category (30 mg/g)
    edit_pipeline_yaml(small_config, "trajectories", "ckd_acr_at_or_above_mg_g", 25)
    message = config_error(small_config)
    assert "ckd_acr_at_or_above_mg_g" in message and "A2" in message


# --------------------------------------------------------------------------- our own words
# A config error is read by whoever edits the YAML file: it names the file and the key and says
# what the value must be in plain words. The validation library's own wording (its messages,
# error codes and help links) never reaches the message.

LIBRARY_WORDING = (
    "Field required",
    "Input should be",
    "Extra inputs are not permitted",
    "value_error",
    "Value error",
    "type=",
    "errors.pydantic.dev",
    "For further information",
    "validation error for",
    "valid integer",
    "valid number",
    "valid boolean",
    "valid string",
    "valid list",
    "valid dictionary",
    "String should",
    "pydantic",
)


def our_words(message: str) -> str:
    words = re.sub(
        r"\S*/", "", message
    ).lower()  # folders left out (a test's tmp folder is named after it)
    for phrase in LIBRARY_WORDING:
        assert phrase.lower() not in words, (phrase, message)
    return message


PIPELINE_CASES = [
    # (section, key, value, what the message says), one per kind of mistake
    ("disclosure", "suppress_max", "ten", "must be a whole number, got 'ten'"),
    ("disclosure", "suppress_max", 2.5, "must be a whole number, got 2.5"),
    ("quality_gate", "max_rejection_rate", "five percent", "must be a number, got 'five percent'"),
    ("measures", "diabetes_rule", "twice", "must be 'confirmed' or 'single', got 'twice'"),
    ("trajectories", "decline_min_span_days", 0, "must be greater than 0, got 0"),
    ("measures", "min_age_years", -1, "must be at least 0, got -1"),
    ("trajectories", "progression_decline", 1.5, "must be less than 1, got 1.5"),
    ("summaries", "window_months", 61, "must be at most 60, got 61"),
    ("measures", "use_height_for_children", "maybe", "must be true or false, got 'maybe'"),
    ("trajectories", "decline_thresholds", 0.3, "must be a list, got 0.3"),
    ("trajectories", "decline_thresholds", [0.3, "forty"], "must be a number, got 'forty'"),
    ("measures", "diabetes_rule", None, "got an empty value"),
    ("demo", "period", "October", "does not have the expected form"),
]


@pytest.mark.parametrize(
    ("section", "key", "value", "says"),
    PIPELINE_CASES,
    ids=[f"{c[1]}={c[2]!r}" for c in PIPELINE_CASES],
)
def test_pipeline_value_errors_in_our_words(small_config: Path, section, key, value, says):
    from tests.conftest import edit_pipeline_yaml

    edit_pipeline_yaml(small_config, section, key, value)
    message = our_words(config_error(small_config))
    path = small_config / "pipeline.yaml"
    where = f"{section}.{key}" + ("[1]" if isinstance(value, list) else "")
    assert message.startswith(f"{path}: key '{where}': "), message
    assert says in message


def test_our_own_validator_keeps_its_message(small_config: Path):
    from tests.conftest import edit_pipeline_yaml

    # KDIGO 2012: the CKD-by-albuminuria rule follows the A2 category (30 mg/g)
    edit_pipeline_yaml(small_config, "trajectories", "ckd_acr_at_or_above_mg_g", 25)
    message = our_words(config_error(small_config))
    assert message.startswith(
        f"{small_config / 'pipeline.yaml'}: key 'trajectories.ckd_acr_at_or_above_mg_g': "
    )
    assert "A2" in message


SOURCE_CASES = [
    ("missing", {k: v for k, v in STANDARD.items() if k != "layout"}, "layout", "required key is missing"),
    ("unknown", {**STANDARD, "delimeter": ";"}, "delimeter", "unknown key"),
    ("text", {**STANDARD, "date_format": 5}, "date_format", "must be text, got 5"),
    ("mapping", {**STANDARD, "test_codes": ["2160-0"]}, "test_codes", "must be a mapping of keys to values, got a list"),
    ("choice", {**STANDARD, "layout": "xml"}, "layout", "must be 'standard', 'delimited', 'fhir_ndjson' or 'parquet', got 'xml'"),
]  # fmt: skip


@pytest.mark.parametrize(
    ("name", "data", "key", "says"), SOURCE_CASES, ids=[c[0] for c in SOURCE_CASES]
)
def test_source_errors_in_our_words(small_config: Path, name, data, key, says):
    path = write_source(small_config, "test_standard_lab", data)
    message = our_words(config_error(small_config))
    assert message.startswith(f"{path}: key '{key}': "), message
    assert says in message


def test_a_kind_we_do_not_translate_gets_a_neutral_sentence():
    """Any other kind of failure: a plain sentence with the value, not the library's message."""
    from decimal import Decimal

    from pydantic import BaseModel, ValidationError

    from pipeline.core.settings import _describe_errors

    class Other(BaseModel):
        amount: Decimal  # a kind no config key has (decimal_parsing)

    with pytest.raises(ValidationError) as info:
        Other.model_validate({"amount": "lots"})
    assert info.value.errors()[0]["type"] == "decimal_parsing"
    message = our_words(_describe_errors(Path("config/other.yaml"), info.value))
    assert (
        message
        == "config/other.yaml: key 'amount': has a value that is not accepted here, got 'lots'"
    )


def test_yaml_syntax_error_names_file_and_line(small_config: Path):
    text = "id: test_standard_lab\nlayout: standard\nfolder: a: b\n"  # line 3: a second colon
    path = write_source(small_config, "test_standard_lab", text)
    message = our_words(config_error(small_config))
    assert message.startswith(f"{path}: line 3 not valid YAML"), message


@pytest.mark.parametrize("command", ["run", "sources check"])
def test_cli_prints_our_message_and_exits_2(small_config: Path, tmp_path: Path, command):
    from typer.testing import CliRunner

    from pipeline.cli import app
    from tests.conftest import edit_pipeline_yaml

    edit_pipeline_yaml(small_config, "disclosure", "suppress_max", "ten")
    extract = tmp_path / "results_2026-10.csv"
    extract.write_text("person_token\n", encoding="utf-8")
    args = {
        "run": ["run", "--period", "2026-10"],
        "sources check": ["sources", "check", "westerfold_general_lab", str(extract)],
    }[command]
    result = CliRunner().invoke(app, [*args, "--config", str(small_config)])
    assert result.exit_code == 2, result.output
    output = our_words(result.output)
    assert "pipeline.yaml" in output and "disclosure.suppress_max" in output
    assert "must be a whole number, got 'ten'" in output
    assert "Traceback" not in output
