"""The run manifest: input files with their SHA-256 (checked with hashlib), counts that
balance, the equations and thresholds in force, and a config hash that follows the config."""

from __future__ import annotations

import hashlib
import json

from pipeline.core.settings import load_settings
from pipeline.run.manifest import config_sha256
from tests.conftest import edit_pipeline_yaml, make_small_config, rows, run_month, write_inbox

STD = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at\n"


def test_manifest_describes_the_run(tmp_path):
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(tmp_path, {
        "westerfold_general_lab/results_2026-01.csv": STD
        + "WF-m1,1960,F,WF01,S1,2026-01-10,2160-0,1.0,mg/dL,final,2026-01-11\n"
        + "WF-m1,1960,F,WF01,S2,2026-01-10,2160-0,ND,mg/dL,final,2026-01-11\n",
    })  # fmt: skip
    out = tmp_path / "out"
    with run_month(config, inbox, out) as con:
        stored = json.loads(rows(con, "select manifest from runs")[0][0])
        status = rows(con, "select status, exit_code, demo_key from runs")[0]
    manifest = json.loads((out / "2026-01" / "run_manifest.json").read_text())
    assert manifest["run_id"] == stored["run_id"]
    assert status == ("published", 0, True)
    [entry] = manifest["input_files"]
    path = inbox / entry["file_path"]
    assert entry["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert entry["rows_read"] == 2 == entry["rows_accepted"] + entry["rows_rejected"]
    assert manifest["equations"]["adult"] == "ckd_epi_2021_creatinine"
    assert manifest["thresholds"]["trajectories"]["decline_thresholds"] == [0.3, 0.4, 0.57]
    assert manifest["config_sha256"] == config_sha256(load_settings(config))
    assert set(manifest["durations_seconds"]) >= {"ingest", "validate", "measure", "link", "summarise",
                                                  "publish", "export"}  # fmt: skip
    assert "KIDNEYSURV" not in json.dumps(manifest) and "WF-m1" not in json.dumps(manifest)


def test_config_hash_follows_the_config(tmp_path):
    config = make_small_config(tmp_path / "config")
    before = config_sha256(load_settings(config))
    edit_pipeline_yaml(config, "disclosure", "suppress_max", 5)
    assert config_sha256(load_settings(config)) != before
