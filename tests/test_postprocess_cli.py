"""`ocrbench balance` and `ocrbench postprocess` on real files, through the real CLI app."""

from __future__ import annotations

import json
import shutil

import pytest
from typer.testing import CliRunner

from ocrbench import synth
from ocrbench.cli.app import app

runner = CliRunner()


@pytest.fixture(scope="module")
def truth_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli_archive")
    synth.write_archive(d, synth.ArchiveSpec(n_pages=6))
    out = tmp_path_factory.mktemp("cli_texts")
    for p in sorted(d.glob("*.txt")):
        shutil.copy(p, out / p.name)
    return out


def _balance(*args):
    r = runner.invoke(app, ["balance", *map(str, args)])
    return r


def test_balance_json_on_demo_ground_truth(truth_dir):
    r = _balance(truth_dir, "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert len(doc["pages"]) == 6
    for page in doc["pages"]:
        assert set(page) >= {"path", "status", "difference"}
        assert page["status"] == "balanced", page
        assert page["difference"] in ("0.00", "£0 0s 0d")
    assert doc["failed"] == [] and doc["estimate"]["pages_failed"] == 0


def test_balance_detects_one_altered_digit(truth_dir, tmp_path):
    for p in truth_dir.glob("*.txt"):
        shutil.copy(p, tmp_path / p.name)
    target = tmp_path / "page_004.txt"
    lines = target.read_text(encoding="utf-8").splitlines()
    line = lines[5]
    i = max(k for k, c in enumerate(line) if c.isdigit())          # last digit of the amount (cents)
    lines[5] = line[:i] + str((int(line[i]) + 3) % 10) + line[i + 1:]
    target.write_text("\n".join(lines) + "\n", encoding="utf-8")
    r = _balance(tmp_path, "--json")
    assert r.exit_code == 0
    pages = {p["path"].rsplit("/", 1)[-1]: p for p in json.loads(r.stdout)["pages"]}
    assert pages["page_004.txt"]["status"] == "unbalanced"
    delta = (int(line[i]) + 3) % 10 - int(line[i])                  # the entry rose by delta cents
    assert pages["page_004.txt"]["difference"] == f"{-delta / 100:.2f}"
    assert all(p["status"] == "balanced" for name, p in pages.items() if name != "page_004.txt")


def test_balance_lists_unreadable_files_and_exits_1(truth_dir, tmp_path):
    shutil.copy(truth_dir / "page_001.txt", tmp_path / "page_001.txt")
    (tmp_path / "broken.txt").write_bytes(b"Total 1.00\n\xc3\x28\n")   # bad byte at 0-based offset 11
    r = _balance(tmp_path, "--json")
    assert r.exit_code == 1
    doc = json.loads(r.stdout)
    assert [p["status"] for p in doc["pages"]] == ["balanced"]
    assert "broken.txt" in doc["failed"][0]["path"] and "offset 11" in doc["failed"][0]["error"]


def test_balance_table_and_usage_errors(truth_dir, tmp_path):
    r = _balance(truth_dir)
    assert r.exit_code == 0
    assert "page_001.txt" in r.stdout and "6 balanced, 0 unbalanced" in r.stdout
    assert "misread rate per amount" in r.stdout
    assert _balance(tmp_path / "nowhere").exit_code == 2
    assert _balance(tmp_path).exit_code == 2                         # no .txt files


def test_postprocess_writes_elsewhere_and_reports(tmp_path):
    src = tmp_path / "in"
    src.mkdir()
    (src / "p1.txt").write_text("paid  to Tarn-\nby for hemp ſome\nPortlcy 12.50\n", encoding="utf-8")
    (src / "p2.txt").write_bytes(b"\xff\n")
    words = tmp_path / "words.txt"
    words.write_text("# payees\nTarnby\nPortley\n", encoding="utf-8")
    out = tmp_path / "out"
    r = runner.invoke(app, ["postprocess", str(src), str(out), "--word-list", str(words),
                            "--steps", "unicode,whitespace,variants,hyphen_join,lexicon", "--json"])
    assert r.exit_code == 1                                          # p2 is not UTF-8
    doc = json.loads(r.stdout)
    assert doc["recipe"].startswith("pp1|unicode(form=NFC)|whitespace|variants")
    assert (out / "p1.txt").read_text(encoding="utf-8") == "paid to Tarnby\nfor hemp some\nPortley 12.50\n"
    assert (src / "p1.txt").read_text(encoding="utf-8").startswith("paid  to Tarn-")   # original untouched
    assert doc["pages"][0]["changed_lines"] == 3 and "p2.txt" in doc["failed"][0]["path"]
    # a confident line is left to itself by the lexicon
    r2 = runner.invoke(app, ["postprocess", str(src / "p1.txt"), str(tmp_path / "o2"), "--word-list", str(words),
                             "--line-confidence", "0.95", "--json"])
    assert (tmp_path / "o2" / "p1.txt").read_text(encoding="utf-8").splitlines()[2] == "Portlcy 12.50"
    assert r2.exit_code == 0


def test_postprocess_config_and_refusals(tmp_path):
    src = tmp_path / "in"
    src.mkdir()
    (src / "p.txt").write_text("ſome  text\n", encoding="utf-8")
    cfg = tmp_path / "ocrbench.toml"
    cfg.write_text('[postprocess]\nsteps = ["whitespace", "variants"]\n[postprocess.variants]\ngroups = ["long_s"]\n',
                   encoding="utf-8")
    r = runner.invoke(app, ["postprocess", str(src), str(tmp_path / "o"), "--config", str(cfg)])
    assert r.exit_code == 0 and (tmp_path / "o" / "p.txt").read_text(encoding="utf-8") == "some text\n"
    assert runner.invoke(app, ["postprocess", str(src), str(src)]).exit_code == 2          # never overwrite
    assert runner.invoke(app, ["postprocess", str(src), str(tmp_path / "o"), "--steps", "spell"]).exit_code == 2
    bad = tmp_path / "bad.toml"
    bad.write_text("[postprocess\n", encoding="utf-8")
    r = runner.invoke(app, ["postprocess", str(src), str(tmp_path / "o"), "--config", str(bad)])
    assert r.exit_code == 2 and "bad.toml" in r.stderr
