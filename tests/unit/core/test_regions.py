"""Tests for pipeline.core.regions: district boundaries from a GeoJSON file (RFC 7946), with a
clear message when a district has no shape or a shape no district."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from pipeline.core.errors import ConfigError
from pipeline.core.regions import read_district_shapes
from pipeline.core.settings import load_settings
from tests.conftest import CONFIG_DIR

SQUARE = {
    "type": "Polygon",
    "coordinates": [[[-29, -39], [-28, -39], [-28, -38], [-29, -38], [-29, -39]]],
}


def write(folder: Path, codes: list[str]) -> Path:
    (folder / "regions").mkdir(parents=True, exist_ok=True)
    doc = {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "properties": {"district_code": c}, "geometry": SQUARE}
            for c in codes
        ],
    }
    (folder / "regions" / "districts.geojson").write_text(json.dumps(doc), encoding="utf-8")
    return folder


def test_the_shipped_boundaries_cover_every_district_once():
    settings = load_settings(CONFIG_DIR)
    shapes = read_district_shapes(CONFIG_DIR, settings.districts)
    assert sorted(shapes) == sorted(settings.districts)


def test_a_district_without_a_shape_is_named(tmp_path):
    folder = write(tmp_path, ["WF01"])
    with pytest.raises(ConfigError, match=r"districts.geojson: no shape for district\(s\) WF02"):
        read_district_shapes(folder, {"WF01": "A", "WF02": "B"})


def test_a_shape_without_a_district_is_named(tmp_path):
    folder = write(tmp_path, ["WF01", "WF99"])
    with pytest.raises(ConfigError, match=r"shape\(s\) for WF99, not a district"):
        read_district_shapes(folder, {"WF01": "A"})


def test_no_file_means_no_map(tmp_path):
    assert read_district_shapes(tmp_path, {"WF01": "A"}) == {}


def test_the_config_check_stops_on_a_mismatch(tmp_path):
    config = tmp_path / "config"
    shutil.copytree(CONFIG_DIR, config)
    doc = json.loads((config / "regions" / "districts.geojson").read_text(encoding="utf-8"))
    doc["features"] = doc["features"][1:]  # WF01's shape removed
    (config / "regions" / "districts.geojson").write_text(json.dumps(doc), encoding="utf-8")
    with pytest.raises(ConfigError, match="no shape for district\\(s\\) WF01"):
        load_settings(config)
