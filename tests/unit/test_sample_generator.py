"""The shipped samples are reproducible: the seeded generator rewrites them byte for byte."""

from __future__ import annotations

import filecmp
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def _files(root: Path) -> dict[str, Path]:
    return {p.relative_to(root).as_posix(): p for p in root.rglob("*") if p.is_file()}


def test_generator_reproduces_the_shipped_samples(tmp_path):
    out, regions = tmp_path / "samples", tmp_path / "regions"
    subprocess.run(
        [sys.executable, str(REPO / "sample_extracts" / "generate.py"), "--out", str(out),
         "--regions-out", str(regions)],
        check=True, capture_output=True,
    )  # fmt: skip
    made = _files(out)
    shipped = {k: v for k, v in _files(REPO / "sample_extracts").items()
               if k not in ("generate.py", "README.md") and "__pycache__" not in k}  # fmt: skip
    assert set(made) == set(shipped)
    assert all(filecmp.cmp(made[k], shipped[k], shallow=False) for k in made)
    for name in ("districts.csv", "population.csv"):
        assert filecmp.cmp(regions / name, REPO / "config" / "regions" / name, shallow=False)
