"""Routing by doubt: the route syntax, which lines go to the slow recogniser, the cost arithmetic, and a
routed run through the runner and the store (both readings kept, resume)."""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest
from typer.testing import CliRunner

import _tiny_models as tm
import _variant_support as vs
from ocrbench import synth
from ocrbench.cli.app import app
from ocrbench.errors import ConfigError, OcrbenchError
from ocrbench.recognisers.card import load_card
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.run.route import (Route, RouteCost, expected_cost, line_doubts, merge_readings, parse_route,
                                routed_lines, threshold_for_share)
from ocrbench.run.routed import run_routed
from ocrbench.store import RunStore


def test_parse_route():
    assert parse_route("ledger-ctc -> ledger-seq if doubt > 0.3") == Route("ledger-ctc", "ledger-seq", 0.3)
    assert parse_route("a->b when doubt>1e-1") == Route("a", "b", 0.1)
    assert parse_route(" models/ledger-ctc  ->  ./x/ledger-seq IF doubt >.5 ") == \
        Route("models/ledger-ctc", "./x/ledger-seq", 0.5)
    assert str(parse_route("a -> b if doubt > 0.25")) == "a -> b if doubt > 0.25"
    for bad in ("a -> b", "a b if doubt > 1", "a -> b if doubt >= 1", "-> b if doubt > 1", "a -> b if doubt > x",
                "a -> a if doubt > 1", "a -> b -> c if doubt > 1"):
        with pytest.raises(ConfigError, match="--route"):
            parse_route(bad)


def test_hand_made_confidences_route_exactly_the_expected_lines():
    # no amounts, no word list: doubt = 1 - confidence (review queue's formula)
    texts = ["alpha beta", "gamma delta", "epsilon", "zeta eta"]
    d = line_doubts(texts, [0.95, 0.625, 0.99, 0.75])   # 1 - 0.625 and 1 - 0.75 are exact in binary
    assert d == pytest.approx([0.05, 0.375, 0.01, 0.25])
    assert routed_lines(d, 0.3) == [1]
    assert routed_lines(d, 0.2) == [1, 3]
    assert routed_lines(d, 0.25) == [1]                # strictly above
    assert routed_lines(d, 1.0) == [] and routed_lines(d, -1) == [0, 1, 2, 3]
    # an unbalanced page (total off by 1.00; one digit of any amount would balance it): every amount
    # line gets the arithmetic part 1.0 on top of 1 - confidence, so all of them go
    d = line_doubts(["Jan 2 rope 12.50", "Jan 3 tar 1.25", "Total 14.75"], [0.99, 0.98, 0.97])
    assert d == pytest.approx([1.01, 1.02, 1.03]) and routed_lines(d, 0.5) == [0, 1, 2]
    d = line_doubts(["Jan 2 rope 12.50", "Jan 3 tar 1.25", "Total 13.75"], [0.99, 0.98, 0.97])
    assert routed_lines(d, 0.5) == []


def test_merge_keeps_slow_reading_on_routed_lines():
    m = merge_readings(["a", "b", "c"], [0.9, 0.2, 0.5], [1, 2], ["B", "C"], [0.8, 0.7])
    assert m.texts == ["a", "B", "C"] and m.confidences == [0.9, 0.8, 0.7] and m.kept == ["fast", "slow", "slow"]
    with pytest.raises(ValueError):
        merge_readings(["a"], [0.9], [0], [], [])


def test_route_cost_by_hand():
    # worked by hand: the fast model reads 100 lines in 20 s; the slow one would take 300 s for all 100 lines
    # (3 s a line); 15 lines are routed, so the route costs 20 + 0.15 * 300 = 65 s, 65 / 300 = 0.2167 of slow
    assert expected_cost(20.0, 300.0, 0.15) == pytest.approx(65.0)
    c = RouteCost(lines=100, routed=15, fast_seconds=20.0, slow_seconds=45.0)
    assert c.share == pytest.approx(0.15) and c.seconds == pytest.approx(65.0)
    assert c.vs_slow_alone(300.0) == pytest.approx(65 / 300)
    with pytest.raises(ValueError):
        expected_cost(1.0, 1.0, 1.5)
    d = [0.9, 0.1, 0.5, 0.3, 0.7]
    x = threshold_for_share(d, 0.4)                    # at most 2 of 5 lines: above 0.5 -> 0.9 and 0.7
    assert x == 0.5 and routed_lines(d, x) == [0, 4]


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("route")
    pages = root / "pages"
    synth.write_archive(pages, synth.ArchiveSpec(n_pages=3, lines_per_page=(5, 7), seed=9))
    for p in pages.glob("*"):
        if p.suffix in (".txt", ".json"):
            p.unlink()
    fast = load_card(tm.write_ctc(root / "fast"))
    slow = load_card(vs.write_lstm_ctc(root / "slow"))
    # a threshold that routes some lines but not all: the median doubt of a plain fast run
    with RunStore(root / "plain.sqlite") as st:
        s = run_pages(pages, [fast], store=st, options=RunOptions(prefetch=False))
        rid = s.recognisers[0].run_id
        doubts = np.concatenate([line_doubts([r[1] for r in st.page_lines(rid, p)],
                                             [r[2] for r in st.page_lines(rid, p)]) for p in st.done_page_ids(rid)])
    return pages, fast, slow, float(np.median(doubts))


def _check_store(db, fast, slow, route):
    with RunStore(db) as st:
        infos = {st.run_info(i).recogniser: st.run_info(i) for i in st.run_ids()}
        f, s, r = infos[fast.name], infos[slow.name], infos[f"{fast.name}->{slow.name}"]
        assert r.kind == "route" and r.settings["route"] == str(route) and s.settings["route_role"] == "slow"
        routed_total = lines_total = 0
        for pid in st.done_page_ids(f.run_id):
            fl = st.page_lines(f.run_id, pid)
            want = routed_lines(line_doubts([x[1] for x in fl], [x[2] for x in fl]), route.threshold)
            sl = st.page_lines(s.run_id, pid)
            assert [x[0] - 1 for x in sl] == want            # the slow run holds exactly the routed lines
            kept = st.page_lines(r.run_id, pid)
            slow_by_no = {x[0]: x for x in sl}
            assert [x[1] for x in kept] == [slow_by_no[x[0]][1] if x[0] in slow_by_no else x[1] for x in fl]
            routed_total += len(sl)
            lines_total += len(fl)
        assert 0 < routed_total < lines_total
        fr = st.read_frames([f.run_id, s.run_id, r.run_id])["pages"]
        t = fr.groupby("run_id").t_encode.sum()
        assert t[r.run_id] == pytest.approx(t[f.run_id] + t[s.run_id])
        return f.run_id, s.run_id, r.run_id


def test_routed_run_keeps_both_readings_and_resumes(setup, tmp_path):
    pages, fast, slow, x = setup
    route = Route(fast.name, slow.name, x)
    db = tmp_path / "r.sqlite"
    s1 = run_routed(pages, [fast, slow], route, store=db, options=RunOptions(prefetch=False))
    assert [r.name for r in s1.recognisers] == [fast.name, slow.name, f"{fast.name}->{slow.name}"]
    fid, sid, rid = _check_store(db, fast, slow, route)
    con = sqlite3.connect(db)
    first = con.execute("SELECT page_id, finished_at FROM pages WHERE run_id=? ORDER BY page_id", (fid,)).fetchall()
    kept_before = con.execute("SELECT page_id, line_no, text FROM lines WHERE run_id=? ORDER BY 1, 2", (rid,)).fetchall()
    # a crash after both readings of the last page were written, before the route's; and one after the fast
    # reading of the page before: drop those pages' later rows
    last, before = first[-1][0], first[-2][0]
    for run, page in ((rid, last), (rid, before), (sid, before)):
        con.execute("DELETE FROM pages WHERE run_id=? AND page_id=?", (run, page))
        con.execute("DELETE FROM lines WHERE run_id=? AND page_id=?", (run, page))
    con.commit()
    s2 = run_routed(pages, [fast, slow], route, store=db, options=RunOptions(prefetch=False))
    assert all(r.resumed for r in s2.recognisers) and s2.pages_skipped == len(first) - 2
    assert [r.pages_new for r in s2.recognisers] == [0, 1, 2]
    # the first reading is never rewritten: same rows, same write time
    assert con.execute("SELECT page_id, finished_at FROM pages WHERE run_id=? ORDER BY page_id", (fid,)).fetchall() \
        == first
    assert con.execute("SELECT page_id, line_no, text FROM lines WHERE run_id=? ORDER BY 1, 2", (rid,)).fetchall() \
        == kept_before
    _check_store(db, fast, slow, route)
    s3 = run_routed(pages, [fast, slow], route, store=db, options=RunOptions(prefetch=False))
    assert s3.pages_skipped == len(first)
    with pytest.raises(OcrbenchError, match="none of the run's recognisers"):
        run_routed(pages, [fast, slow], Route("nope", slow.name, 0.1), store=db)


def test_route_command(setup, tmp_path):
    pages, fast, slow, x = setup
    db = tmp_path / "c.sqlite"
    args = ["run", str(pages), "-r", str(fast.folder), "-r", str(slow.folder), "--store", str(db),
            "--route", f"{fast.folder} -> {slow.name} if doubt > {x}", "--json"]
    r = CliRunner().invoke(app, args)
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert [x["kind"] for x in doc["recognisers"]] == ["ctc", "ctc", "route"]
    _check_store(db, fast, slow, Route(str(fast.folder), slow.name, x))
    # review lists the fast reading and the kept text; the re-reading (some lines only) only on request
    r = CliRunner().invoke(app, ["review", str(db), "--json", "--lines", "1"])
    assert [x["recogniser"] for x in json.loads(r.stdout)["runs"]] == [fast.name, f"{fast.name}->{slow.name}"]
    r = CliRunner().invoke(app, args[:-1])                     # human output, resumed
    assert r.exit_code == 0 and f"route: {slow.name} re-read" in r.stdout and "resumed" in r.stdout
    r = CliRunner().invoke(app, args[:-2] + ["a b c", "--json"])
    assert r.exit_code == 2 and "FAST -> SLOW if doubt > X" in r.stderr
    r = CliRunner().invoke(app, args + ["--workers", "2"])
    assert r.exit_code == 2 and "--route takes exactly two" in r.stderr


def test_routed_run_records_a_bad_page_in_every_run(setup, tmp_path):
    import shutil

    pages, fast, slow, x = setup
    bad = tmp_path / "pages"
    shutil.copytree(pages, bad)
    (bad / "page_000_broken.png").write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    s = run_routed(bad, [fast, slow], Route(fast.name, slow.name, x), store=tmp_path / "b.sqlite",
                   options=RunOptions(prefetch=False))
    assert [r.pages_failed for r in s.recognisers] == [1, 1, 1]
    assert [r.pages_done for r in s.recognisers] == [3, 3, 3]
    assert s.failed_pages == ["page_000_broken.png"]
