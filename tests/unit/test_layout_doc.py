"""DEVELOPERS.md's layout names every module and package of pipeline/, and nothing that is gone."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _documented() -> set[str]:
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    block = text.split("## Layout", 1)[1].split("```", 2)[1]
    body = block.split("\nsql/", 1)[0]  # the pipeline/ part of the tree
    return set(re.findall(r"^  (\w+(?:\.py|/))", body, flags=re.MULTILINE))


def _present() -> set[str]:
    here = ROOT / "pipeline"
    names = {p.name for p in here.glob("*.py") if p.name != "__init__.py"}
    names |= {p.name + "/" for p in here.iterdir() if p.is_dir() and p.name != "__pycache__"}
    return names


def test_developers_layout_matches_the_package():
    assert _documented() == _present()
