"""District boundaries for the report's maps, from ``config/regions/districts.geojson``.

GeoJSON (RFC 7946, an open standard): a FeatureCollection whose features carry the property
``district_code`` and a Polygon or MultiPolygon geometry in longitude/latitude. The demo ships
invented boundaries for its invented region; a real region drops in its own file. Every district
of ``districts.csv`` must have exactly one shape and every shape a district: a mismatch stops
the run with the file and the codes (a map that silently leaves a district out reads as "no
data" where there is data). Without the file there is no map, and the report says so.

The shapes are kept in ``reference.district_shapes`` (one row per district, its geometry as
GeoJSON text) so that the report, which reads only the warehouse, can draw them.
"""

from __future__ import annotations

import json
from pathlib import Path

from pipeline.core.errors import ConfigError

SHAPES_FILE = Path("regions") / "districts.geojson"


def read_district_shapes(config_dir: Path, districts: dict[str, str]) -> dict[str, dict]:
    """district_code -> GeoJSON geometry; {} when the file does not exist."""
    path = Path(config_dir) / SHAPES_FILE
    if not path.is_file():
        return {}
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ConfigError(f"{path}: not valid GeoJSON ({exc})") from None
    if (
        not isinstance(doc, dict)
        or doc.get("type") != "FeatureCollection"
        or not isinstance(doc.get("features"), list)
    ):
        raise ConfigError(f"{path}: expected a GeoJSON FeatureCollection")
    shapes: dict[str, dict] = {}
    for n, feature in enumerate(doc["features"], start=1):
        props = (feature or {}).get("properties") or {}
        code = props.get("district_code")
        geometry = (feature or {}).get("geometry") or {}
        if not isinstance(code, str) or not code:
            raise ConfigError(f"{path}: feature {n} has no property district_code")
        if geometry.get("type") not in ("Polygon", "MultiPolygon") or not _valid_coordinates(
            geometry
        ):
            raise ConfigError(
                f"{path}: feature {n} ({code}): geometry must be a Polygon or MultiPolygon "
                "of [longitude, latitude] positions"
            )
        if code in shapes:
            raise ConfigError(
                f"{path}: district_code {code} has more than one feature (use one MultiPolygon)"
            )
        shapes[code] = geometry
    no_shape = sorted(set(districts) - set(shapes))
    no_district = sorted(set(shapes) - set(districts))
    problems = []
    if no_shape:
        problems.append(f"no shape for district(s) {', '.join(no_shape)} of regions/districts.csv")
    if no_district:
        problems.append(
            f"shape(s) for {', '.join(no_district)}, not a district in regions/districts.csv"
        )
    if problems:
        raise ConfigError(f"{path}: " + "; ".join(problems))
    return shapes


def _valid_coordinates(geometry: dict) -> bool:
    polygons = (
        geometry["coordinates"] if geometry["type"] == "MultiPolygon" else [geometry["coordinates"]]
    )
    try:
        return bool(polygons) and all(
            len(ring) >= 4
            and all(
                len(p) >= 2 and -180 <= float(p[0]) <= 180 and -90 <= float(p[1]) <= 90
                for p in ring
            )
            for polygon in polygons
            for ring in polygon
        )
    except (TypeError, ValueError):
        return False
