"""Execution providers through the run command: one this onnxruntime lacks stops the run before any
page unless the user allows the CPU fallback; with it, the run goes on and the store records both the
providers used and the warning."""

from __future__ import annotations

import json
import sqlite3

import onnxruntime as ort
from typer.testing import CliRunner

import _tiny_models as tm
from _scaleout_support import small_pages
from ocrbench.cli.app import app

MISSING = "CUDAExecutionProvider"     # a provider onnxruntime knows; this CPU build does not carry it


def test_a_missing_provider_stops_the_run_unless_the_fallback_is_allowed(tmp_path):
    assert MISSING not in ort.get_available_providers()
    pages = small_pages(tmp_path / "pages", 2, seed=5)
    card = tm.write_ctc(tmp_path / "ctc")
    db = tmp_path / "s.sqlite"
    base = ["run", str(pages), "-r", str(card), "--store", str(db), "--provider", MISSING]
    refused = CliRunner().invoke(app, base)
    assert refused.exit_code == 2 and MISSING in refused.stderr and "--allow-cpu-fallback" in refused.stderr
    assert not db.exists()                                      # nothing opened before the check
    allowed = CliRunner().invoke(app, base + ["--allow-cpu-fallback", "--provider-option", "device_id=0"])
    assert allowed.exit_code == 0, allowed.output
    assert "warning" in allowed.stderr and MISSING in allowed.stderr
    con = sqlite3.connect(db)
    host, settings = con.execute("SELECT host_json, settings_json FROM runs").fetchone()
    host, settings = json.loads(host), json.loads(settings)
    assert host["providers"] == ["CPUExecutionProvider"]
    assert any(MISSING in w for w in host["provider_warnings"])
    assert MISSING in json.dumps(settings)                      # what was asked for is part of the run's settings


def test_a_malformed_provider_option_is_a_usage_error(tmp_path):
    pages = small_pages(tmp_path / "pages", 1, seed=5)
    card = tm.write_ctc(tmp_path / "ctc")
    res = CliRunner().invoke(app, ["run", str(pages), "-r", str(card), "--store", str(tmp_path / "s.sqlite"),
                                   "--provider-option", "no-equals-sign"])
    assert res.exit_code == 2 and "key=value" in res.stderr
