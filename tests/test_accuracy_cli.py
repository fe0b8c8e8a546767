"""`ocrbench score` on real files and a real SQLite run store, through the real CLI app."""

from __future__ import annotations

import json
import random

import pandas as pd
import pytest
from typer.testing import CliRunner

from _accuracy_reference import wagner_fischer
from ocrbench import synth
from ocrbench.cli.app import app
from ocrbench.store import LineRecord, PageRecord, RunStore

runner = CliRunner()


def _noisy(rng: random.Random, s: str, p: float) -> str:
    return "".join(rng.choice("0123456789abc") if rng.random() < p else c for c in s)


@pytest.fixture()
def archive(tmp_path):
    """Truth folder and a hypothesis folder (5 % substitutions) for 8 invented pages."""
    rng = random.Random(1)
    truth, hyp = tmp_path / "truth", tmp_path / "hyp"
    truth.mkdir()
    hyp.mkdir()
    pages = {}
    for k in range(8):
        ref = [" ".join(synth.ledger_line_fields(rng)) for _ in range(rng.randint(4, 9))]
        out = [_noisy(rng, ln, 0.05) for ln in ref]
        pages[f"page_{k:03d}"] = (ref, out)
        (truth / f"page_{k:03d}.txt").write_text("\n".join(ref) + "\n", encoding="utf-8")
        (hyp / f"page_{k:03d}.txt").write_bytes(("\r\n".join(out) + "\r\n").encode("utf-8"))
    return truth, hyp, pages


def _score(*args):
    return runner.invoke(app, ["score", *map(str, args)])


def test_json_summary_from_folders(archive):
    truth, hyp, pages = archive
    r = _score("--truth", truth, "--hyp", hyp, "--json", "--boot", 500)
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    # Corpus CER by the definition, with Wagner & Fischer (1974) as the reference DP.
    edits = sum(wagner_fischer(a, b) for ref, out in pages.values() for a, b in zip(ref, out))
    chars = sum(len(a) for ref, _ in pages.values() for a in ref)
    assert doc["cer"] == pytest.approx(edits / chars)
    assert doc["cer_low"] <= doc["cer"] <= doc["cer_high"] and doc["wer_low"] <= doc["wer"] <= doc["wer_high"]
    assert set(doc["classes"]) == {"digit", "letter", "punct", "space", "other"}
    assert doc["recipe"].startswith("metric=cer;unit=codepoint;profile=nfc.1;")
    assert doc["unpaired"] == {"hyp_without_truth": [], "truth_without_hyp": []} and doc["unreadable"] == []


def test_unpaired_and_unreadable_files_are_listed_and_exit_1(archive):
    truth, hyp, _ = archive
    (hyp / "page_099.txt").write_text("stray\n")
    (hyp / "page_000.txt").unlink()
    (hyp / "page_001.txt").write_bytes(b"ok\n\xfe\n")
    r = _score("--truth", truth, "--hyp", hyp, "--json", "--boot", 200)
    assert r.exit_code == 1
    doc = json.loads(r.stdout)
    assert doc["unpaired"]["hyp_without_truth"] == [str(hyp / "page_099.txt")]
    assert doc["unpaired"]["truth_without_hyp"] == [str(truth / "page_000.txt")]
    assert doc["unreadable"][0]["path"] == str(hyp / "page_001.txt")
    assert "byte offset 3" in doc["unreadable"][0]["error"]
    assert doc["pages"] == 6                                  # the rest was scored
    assert "page_099.txt" in r.stderr and "byte offset 3" in r.stderr


def test_tables_written_as_csv_and_parquet(archive, tmp_path):
    truth, hyp, pages = archive
    out = tmp_path / "scores"
    r = _score("--truth", truth, "--hyp", hyp, "--out", out, "--boot", 200)
    assert r.exit_code == 0, r.output
    assert "CER (corpus)" in r.stdout and "recipe: metric=cer" in r.stdout
    lines_csv, lines_pq = pd.read_csv(out / "lines.csv"), pd.read_parquet(out / "lines.parquet")
    assert len(lines_csv) == len(lines_pq) == sum(len(ref) for ref, _ in pages.values())
    pages_pq = pd.read_parquet(out / "pages.parquet")
    assert sorted(pages_pq["page_id"]) == sorted(pages)
    assert pages_pq["char_edits"].sum() == json.loads((out / "summary.json").read_text())["char_edits"]
    assert (out / "confusions.parquet").exists() and (out / "amounts.csv").exists()


def test_usage_errors_exit_2(archive, tmp_path):
    truth, hyp, _ = archive
    assert _score("--truth", truth).exit_code == 2
    assert _score("--truth", truth, "--hyp", hyp, "--store", tmp_path / "s.sqlite").exit_code == 2
    assert _score("--truth", truth, "--hyp", hyp, "--profile", "strict").exit_code == 2
    assert _score("--truth", tmp_path / "nowhere", "--hyp", hyp).exit_code == 2
    assert _score("--truth", truth, "--hyp", hyp, "--post").exit_code == 2
    assert _score("--truth", truth, "--store", tmp_path / "missing.sqlite").exit_code == 2


def _store_with_two_runs(path, pages):
    with RunStore(path) as st:
        ids = []
        for name, p, h in (("ctc-demo", 0.02, "a" * 64), ("seq-demo", 0.10, "b" * 64)):
            rng = random.Random(name)
            rid = st.start_run(recogniser=name, kind=name[:3], card_path=f"/models/{name}/card.toml",
                               card_hash=h, settings={}, input_dir="/pages", host={}, engine="test")
            for stem, (ref, _) in pages.items():
                out = [_noisy(rng, ln, p) for ln in ref]
                lines = [LineRecord(line_no=i + 1, x0=0, y0=0, x1=1, y1=1, width_px=1, text=t,
                                    text_post=ref[i] if name == "seq-demo" else None, confidence=0.9)
                         for i, t in enumerate(out)]
                st.write_page(rid, PageRecord(page_id=f"{stem}.png", path=f"/pages/{stem}.png", content_hash="x",
                                              status="done", n_lines=len(lines)), lines)
            st.write_page(rid, PageRecord(page_id="page_404.png", path="/pages/page_404.png", content_hash=None,
                                          status="failed", error="truncated PNG"))
            if name == "seq-demo":
                st.set_post_recipe(rid, "test: the truth itself")
            st.finish_run(rid)
            ids.append(rid)
    return ids


def test_store_with_several_runs(archive, tmp_path):
    truth, _, pages = archive
    store = tmp_path / "runs.sqlite"
    ctc, seq = _store_with_two_runs(store, pages)
    r = _score("--truth", truth, "--store", store, "--json", "--boot", 500)
    assert r.exit_code == 1                       # a page failed in each run: listed
    doc = json.loads(r.stdout)
    assert [s["run_id"] for s in doc["systems"]] == [ctc, seq]
    assert doc["systems"][0]["failed_pages"] == [{"page_id": "page_404.png", "error": "truncated PNG"}]
    assert "rec=aaaaaaaaaaaa" in doc["systems"][0]["recipe"]
    assert doc["systems"][0]["cer"] < doc["systems"][1]["cer"]
    [cmp] = doc["comparisons"]
    assert cmp["winner"] == doc["systems"][0]["system"] and cmp["high"] < 0

    both = json.loads(_score("--truth", truth, "--store", store, "--run", seq, "--post", "--json",
                             "--boot", 200).stdout)
    raw, post = both["systems"]                         # --post: raw and post-processed side by side
    assert raw["run_id"] == post["run_id"] == seq and post["system"].endswith("post-processed")
    assert post["cer"] == 0 and raw["cer"] > 0          # post-processed text equals the truth here
    assert both["comparisons"][0]["winner"] == post["system"]
    r = _score("--truth", truth, "--store", store, "--run", ctc, "--post")
    assert r.exit_code == 2 and "no post-processed text" in r.output
