"""Tests for pipeline.core.settings: the shipped config loads; every kind of mistake in a file gives one
ConfigError naming the file and the key, never a Python traceback."""

from __future__ import annotations

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
