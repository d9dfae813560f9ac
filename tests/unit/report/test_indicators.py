"""Tests for pipeline.report.indicators helpers: a lab keeps its colour when labs are added."""

from __future__ import annotations

from pipeline.report.html import PALETTE
from pipeline.report.indicators import source_style

LABS = ["corvale_lab_chain", "fallowmere_reference_lab", "westerfold_general_lab"]


def test_a_lab_keeps_its_colour_when_another_is_added():
    before = {lab: source_style(lab, LABS) for lab in LABS}
    after = {lab: source_style(lab, [*LABS, "new_lab_a"]) for lab in [*LABS, "new_lab_a"]}
    assert all(after[lab] == before[lab] for lab in LABS)
    # the order labs are listed in does not matter
    assert {lab: source_style(lab, list(reversed(LABS))) for lab in LABS} == before


def test_up_to_six_labs_get_six_colours():
    labs = [f"lab_{i}" for i in range(len(PALETTE))]
    colours = {source_style(lab, labs)[0] for lab in labs}
    assert colours == set(PALETTE)
