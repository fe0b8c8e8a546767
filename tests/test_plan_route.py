"""The planner's options (issue 20): routes' cost and CER, the threshold chosen for a target CER, the frontier
in the report, and the route in a plan file.

Hand-made per-line data for the arithmetic; for the rest, real runs of the tiny ONNX recognisers
(tests/_tiny_models.py, tests/_variant_support.py) on invented pages, with ground truth written from
their own readings so that the right answer is known.
"""

from __future__ import annotations

import json
import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import _tiny_models as tm
import _variant_support as vs
from ocrbench import synth
from ocrbench.cli.app import app
from ocrbench.io.text import text_stem
from ocrbench.errors import ConfigError, PlanError
from ocrbench.planning.inputs import load_plan_file
from ocrbench.planning.options import choose_for_target, frontier, option_of
from ocrbench.planning.people import Correction
from ocrbench.planning.routes import (RouteLines, RouteSpec, candidate_thresholds, evaluate_thresholds,
                                      parse_plan_route, route_compute, route_row)
from ocrbench.planning.service import PlanRequest, plan
from ocrbench.recognisers.card import load_card
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.run.route import line_doubts
from ocrbench.store import RunStore


# --------------------------------------------------------------------------- cost by hand


def test_route_cost_worked_by_hand():
    # Worked by hand. FAST reads the whole archive in 10 h on 1 worker x 1 thread (10 core-hours; at 0.05 a
    # core-hour, 0.50); SLOW would take 40 h (40 core-hours, 2.00). A quarter of the lines are routed:
    #   wall-clock  = 10 h + 0.25 x 40 h = 20 h (72,000 s)
    #   core-hours  = 10   + 0.25 x 40   = 20
    #   compute     = 0.50 + 0.25 x 2.00 = 1.00 (P90: 0.60 + 0.25 x 2.40 = 1.20)
    # People, full review (4 s a line + 1 s per 10 characters; 10 s an error; 20 an hour), 30,000 lines of
    # 1,000,000 characters: reading (120,000 + 100,000) s = 61.111 h; the route's CER 1.0 % (0.8-1.2 %)
    # -> 10,000 errors -> 27.778 h correcting; people 88.889 h -> 1,777.78; total 1,778.78
    # (high: 12,000 errors -> 33.333 h -> 94.444 h -> 1,888.89 + 1.20 = 1,890.09).
    h = 3600.0
    fast = {"recogniser": "fast", "kind": "ctc", "profile": "box", "lines": 30_000.0, "characters": 1_000_000.0,
            "wall_seconds_p10": 9 * h, "wall_seconds_p50": 10 * h, "wall_seconds_p90": 12 * h, "core_hours": 10.0,
            "core_hours_p90": 12.0, "compute_cost": 0.50, "compute_cost_p90": 0.60, "startup_seconds": 2.0}
    slow = fast | {"recogniser": "slow", "kind": "seq", "wall_seconds_p10": 36 * h, "wall_seconds_p50": 40 * h,
                   "wall_seconds_p90": 48 * h, "core_hours": 40.0, "core_hours_p90": 48.0, "compute_cost": 2.00,
                   "compute_cost_p90": 2.40, "startup_seconds": 4.0}
    c = route_compute(fast, slow, 0.25)
    assert c["wall_seconds_p50"] == pytest.approx(72_000.0) and c["core_hours"] == pytest.approx(20.0)
    assert c["compute_cost"] == pytest.approx(1.00) and c["compute_cost_p90"] == pytest.approx(1.20)
    assert c["wall_seconds_p90"] == pytest.approx(24 * h) and c["startup_seconds"] == pytest.approx(3.0)
    corr = Correction(seconds_per_error=10, price_hour=20.0)
    r = route_row(fast, slow, 0.25, (0.010, 0.008, 0.012), name="fast -> slow if doubt > 0.3", correction=corr,
                  deadline_s=None, budget=1800.0)
    assert r["review_hours"] == pytest.approx(220_000 / 3600)
    assert r["correction_hours"] == pytest.approx(10_000 * 10 / 3600)
    assert r["people_cost"] == pytest.approx(1777.78, abs=0.01)
    assert r["cost"] == pytest.approx(1778.78, abs=0.01) and r["cost_high"] == pytest.approx(1890.09, abs=0.01)
    assert r["meets_budget"] is False and r["kind"] == "route" and r["routed_share"] == 0.25
    # unpriced compute stays unpriced
    assert route_compute(fast | {"compute_cost": None}, slow, 0.5)["compute_cost"] is None


# --------------------------------------------------------------------------- threshold choice on hand-made lines


def _hand_lines() -> RouteLines:
    """4 pages x 5 lines of 10 truth characters. FAST misreads one line a page (2 characters wrong) and doubts
    exactly those lines most (0.9); SLOW reads every line right. Doubts of the others: 0.1, 0.2, 0.3, 0.4."""
    rows, truth = [], {}
    for p in range(4):
        pid = f"p{p}"
        words = [f"line{p}{k}abcd"[:10] for k in range(5)]
        truth[pid] = words
        bad = p % 5
        others = iter([0.1, 0.2, 0.3, 0.4])
        for k, w in enumerate(words):
            fast = ("XY" + w[2:]) if k == bad else w
            rows.append({"page_id": pid, "line_no": k + 1, "doubt": 0.9 if k == bad else next(others),
                         "fast": fast, "slow": w})
    return RouteLines("fast", "slow", "hand", pd.DataFrame(rows), truth)


def test_threshold_choice_picks_cheapest_option_meeting_target():
    rl = _hand_lines()
    # quantiles at 5 %..95 % of 20 doubts (four each of 0.1, 0.2, 0.3, 0.4, 0.9), linear interpolation:
    # 5 % sits at position 0.95 (0.1 and 0.1), 95 % at 18.05 (0.9 and 0.9), 20 % at 3.8 (0.1 + 0.8 x 0.1)
    xs = candidate_thresholds(rl.lines["doubt"], extra=[0.55])
    assert xs[0] == pytest.approx(0.1) and xs[-1] == pytest.approx(0.9) and 0.55 in xs
    assert all(a < b for a, b in zip(xs, xs[1:])) and any(x == pytest.approx(0.18) for x in xs)
    ev = {round(e["threshold"], 6): e for e in evaluate_thresholds(rl, [0.05, 0.35, 0.5, 0.9], n_boot=200)}
    # doubt > 0.5 routes exactly the 4 misread lines: share 4/20, no error left
    assert ev[0.5]["share"] == pytest.approx(0.2) and ev[0.5]["cer"] == 0.0 and ev[0.5]["cer_high"] == 0.0
    assert ev[0.35]["share"] == pytest.approx(0.4) and ev[0.35]["cer"] == 0.0
    assert ev[0.05]["share"] == pytest.approx(1.0)
    # nothing routed: FAST's own CER, 8 wrong characters in 200
    assert ev[0.9]["share"] == 0.0 and ev[0.9]["cer"] == pytest.approx(8 / 200)
    h = 3600.0
    base = {"profile": "box", "lines": 20_000.0, "characters": 200_000.0, "wall_seconds_p10": h,
            "wall_seconds_p50": h, "wall_seconds_p90": h, "core_hours": 1.0, "core_hours_p90": 1.0,
            "startup_seconds": 0.0, "meets_deadline": None, "meets_budget": None}
    fast = base | {"recogniser": "fast", "kind": "ctc", "compute_cost": 10.0, "compute_cost_p90": 10.0}
    slow = base | {"recogniser": "slow", "kind": "seq", "compute_cost": 100.0, "compute_cost_p90": 100.0}
    corr = Correction(price_hour=20.0, review="none")       # no people: cost is compute alone, easy to follow
    singles = [option_of(fast | {"cost": 10.0, "cost_high": 10.0, "cer": 0.04, "cer_low": 0.02, "cer_high": 0.06,
                                 "people_cost": 0.0}),
               option_of(slow | {"cost": 100.0, "cost_high": 100.0, "cer": 0.0, "cer_low": 0.0, "cer_high": 0.0,
                                 "people_cost": 0.0})]
    routes = []
    for x, e in sorted(ev.items()):
        if e["share"] == 0:
            continue                # routes nothing: FAST alone (the planner leaves such a threshold out)
        r = route_row(fast, slow, e["share"], (e["cer"], e["cer_low"], e["cer_high"]),
                      name=f"fast -> slow if doubt > {x:g}", correction=corr, deadline_s=None, budget=None)
        routes.append(option_of(r | {"threshold": x}))
    options = singles + routes
    chosen, text = choose_for_target(options, 0.01, "cost", "GBP")
    # 10 + 0.2 x 100 = 30: cheaper than routing 40 % (50) or everything (110) or SLOW alone (100)
    assert chosen["option"] == "fast -> slow if doubt > 0.5" and chosen["cost"] == pytest.approx(30.0)
    assert "upper end of the CER's 95 % interval" in text and "GBP 30.00" in text
    lost = {o["option"]: o["lost"] for o in options}
    assert lost["fast"].startswith("CER up to 6.000 %, above the target 1.000 %")
    assert lost["slow"] == "meets the target but costs GBP 70.00 more"
    assert lost["fast -> slow if doubt > 0.35"] == "meets the target but costs GBP 20.00 more"
    # frontier: FAST (cheapest), the 0.5 route; SLOW and the routes over 0.5's cost with no lower CER are not
    on = {o["option"]: f for o, f in zip(options, frontier(options, "cost"))}
    assert on == {"fast": True, "slow": False, "fast -> slow if doubt > 0.05": False,
                  "fast -> slow if doubt > 0.35": False, "fast -> slow if doubt > 0.5": True}


def test_a_target_no_option_meets_is_said_plainly():
    options = [option_of({"recogniser": n, "kind": "ctc", "cost": c, "cer": e, "cer_low": e / 2, "cer_high": 2 * e,
                          "meets_deadline": None, "meets_budget": None}) for n, c, e in
               (("a", 10.0, 0.02), ("b", 30.0, 0.01))]
    chosen, text = choose_for_target(options, 0.005, "cost", "EUR")
    assert chosen is None and all(not o["chosen"] for o in options)
    assert text.startswith("no option meets the target CER of 0.500 %") and "nothing is recommended" in text
    assert "b's, 2.000 %" in text
    assert options[1]["lost"] == "CER up to 2.000 %, above the target 0.500 %"


def test_a_route_that_reads_lines_slow_never_read_is_not_evaluated():
    rl = _hand_lines()
    rl.lines.loc[rl.lines["doubt"] < 0.5, "slow"] = None    # a routed run at doubt > 0.5: SLOW read 4 lines
    got = [e["threshold"] for e in evaluate_thresholds(rl, [0.05, 0.35, 0.5, 0.9], n_boot=50)]
    assert got == [0.5, 0.9]


# --------------------------------------------------------------------------- plan file and --route


def test_plan_file_route_and_target(tmp_path):
    f = tmp_path / "plan.toml"
    f.write_text('calibration = ["cal.sqlite"]\n[goals]\ntarget_cer = 0.004\n'
                 '[route]\nfast = "ledger-ctc"\nslow = "ledger-seq"\nthreshold = 0.3\n', encoding="utf-8")
    req = load_plan_file(f)
    assert req.target_cer == 0.004 and req.route == "ledger-ctc -> ledger-seq if doubt > 0.3"
    assert parse_plan_route(req.route) == RouteSpec("ledger-ctc", "ledger-seq", 0.3)
    f.write_text('calibration = ["cal.sqlite"]\n[route]\nfast = "a"\nslow = "b"\n', encoding="utf-8")
    assert parse_plan_route(load_plan_file(f).route) == RouteSpec("a", "b", None)
    f.write_text('calibration = ["cal.sqlite"]\n[route]\nfast = "a"\nslow = "b"\nthresold = 0.3\n', encoding="utf-8")
    with pytest.raises(ConfigError, match=r"plan.toml.*route\.thresold.*did you mean 'route\.threshold'"):
        load_plan_file(f)
    f.write_text('calibration = ["cal.sqlite"]\n[route]\nfast = "a"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match="route.slow is needed"):
        load_plan_file(f)
    f.write_text('calibration = ["cal.sqlite"]\n[goals]\ntarget_cer = 4\n', encoding="utf-8")
    with pytest.raises(ConfigError, match="goals.target_cer"):
        load_plan_file(f)
    assert parse_plan_route("a->b when doubt > 0.25") == RouteSpec("a", "b", 0.25)
    with pytest.raises(ConfigError, match="FAST -> SLOW"):
        parse_plan_route("a b")


# --------------------------------------------------------------------------- real runs


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """4 invented pages read by the tiny CTC (FAST) and LSTM (SLOW) recognisers into one store; ground truth
    written so that SLOW's reading is right on the lines FAST doubts most (above the median doubt) and FAST's
    reading is right elsewhere: the route at the median has no error at all."""
    root = tmp_path_factory.mktemp("plan_route")
    pages = root / "pages"
    synth.write_archive(pages, synth.ArchiveSpec(n_pages=4, lines_per_page=(5, 7), seed=9))
    for p in pages.glob("*"):
        if p.suffix in (".txt", ".json"):
            p.unlink()
    fast = load_card(tm.write_ctc(root / "fast"))
    slow = load_card(vs.write_lstm_ctc(root / "slow"))
    db = root / "cal.sqlite"
    with RunStore(db) as st:
        s = run_pages(pages, [fast, slow], store=st, options=RunOptions(prefetch=False))
        fid, sid = (r.run_id for r in s.recognisers)
        per_page = {p: (st.page_lines(fid, p), st.page_lines(sid, p)) for p in st.done_page_ids(fid)}
    doubts = {p: line_doubts([x[1] for x in f], [x[2] for x in f]) for p, (f, _s) in per_page.items()}
    x = float(np.median(np.concatenate(list(doubts.values()))))
    truth = root / "truth"
    truth.mkdir()
    for p, (f, s_) in per_page.items():
        lines = [sl[1] if d > x else fl[1] for fl, sl, d in zip(f, s_, doubts[p])]
        (truth / f"{text_stem(p)}.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
    all_d = np.concatenate(list(doubts.values()))
    return {"root": root, "pages": pages, "db": db, "truth": truth, "fast": fast.name, "slow": slow.name, "x": x,
            "share": float((all_d > x).mean())}


def _req(b, **kw) -> PlanRequest:
    return PlanRequest(calibration=[str(b["db"])], archive_store=b["db"], pages=10_000, truth=b["truth"],
                       price_core_hour=0.05, correction_price_hour=20.0, currency="GBP", draws=200, **kw)


def test_plan_prices_a_route_as_fast_plus_share_of_slow(built):
    b = built
    res = plan(_req(b, route=f"{b['fast']} -> {b['slow']} if doubt > {b['x']!r}"))
    rows = {r["recogniser"]: r for r in res.table.to_dict("records")}
    opts = {o["option"]: o for o in res.table.attrs["options"]}
    [route] = [o for o in opts.values() if o["kind"] == "route"]
    assert route["routed_share"] == pytest.approx(b["share"]) and 0 < b["share"] < 1
    f, s = rows[b["fast"]], rows[b["slow"]]
    for k in ("core_hours", "compute_cost", "wall_seconds_p50"):
        assert route[k] == pytest.approx(f[k] + b["share"] * s[k])
    # the truth was written from the route's own readings at this threshold
    assert route["cer"] == 0.0 and route["cer_high"] == 0.0
    # the total is compute + people, as for a single recogniser
    assert route["cost"] == pytest.approx(route["compute_cost"] + route["people_cost"])


def test_plan_chooses_threshold_for_target_and_says_why_others_lost(built):
    b = built
    res = plan(_req(b, target_cer=0.0))
    t = res.table.attrs["target"]
    opts = res.table.attrs["options"]
    assert t["target_cer"] == 0.0 and "upper end" in t["bound"]
    chosen = [o for o in opts if o["chosen"]]
    assert len(chosen) == 1 and chosen[0]["kind"] == "route" and chosen[0]["cer_high"] == 0.0
    assert chosen[0]["route_fast"] == b["fast"] and chosen[0]["option"] == t["chosen"]
    meeting = [o for o in opts if o["cer_high"] == 0.0]
    assert chosen[0]["cost"] == min(o["cost"] for o in meeting)
    assert all(o["lost"] for o in opts if not o["chosen"])
    assert res.table.attrs["recommendation"]["recogniser"] == chosen[0]["option"]
    # the chosen route gets its column in the side-by-side plan
    assert chosen[0]["option"] in set(res.table["recogniser"])


def test_plan_command_says_plainly_when_no_option_meets_the_target(built):
    b = built
    # SLOW alone (a route that routes no line is SLOW alone, and is left out) and FAST alone: each has errors
    # where the truth took the other's reading, so no option reaches a CER of 0
    args = ["plan", "--calibration", str(b["db"]), "--archive-store", str(b["db"]), "--pages", "10000", "--truth",
            str(b["truth"]), "--price-core-hour", "0.05", "--price-correction-hour", "20", "--currency", "GBP",
            "--draws", "100", "--route", f"{b['slow']} -> {b['fast']} if doubt > 1e9", "--target-cer", "0"]
    r = CliRunner().invoke(app, args + ["--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert [o["kind"] for o in doc["options"]] == ["ctc", "ctc"] and doc["target"]["chosen"] is None
    assert doc["recommendation"]["recogniser"] is None
    assert doc["target"]["text"].startswith("no option meets the target CER of 0.000 %")
    assert any("routes no line" in n for n in doc["options_notes"])
    r = CliRunner().invoke(app, args, env={"COLUMNS": "250"})
    assert r.exit_code == 0 and "no option meets the target CER" in r.stdout and "nothing is recommended" in r.stdout


def test_report_shows_the_frontier_with_the_chosen_option(built, tmp_path):
    from ocrbench.report import write_report

    b = built
    files = write_report(b["db"], tmp_path / "rep", truth=b["truth"], n_boot=100, curve_max_workers=2,
                         plan=PlanRequest(pages=10_000, price_core_hour=0.05, correction_price_hour=20.0,
                                          currency="GBP", draws=100, target_cer=0.0))
    html = files.html.read_text(encoding="utf-8")
    summary = json.loads(files.summary.read_text(encoding="utf-8"))
    opts = summary["plan"]["options"]
    [chosen] = [o for o in opts if o["chosen"]]
    assert chosen["kind"] == "route" and chosen["frontier"] and chosen["cer_high"] == 0.0
    assert 'id="plan-options"' in html and 'id="fig-plan-frontier"' in html
    i = opts.index(chosen)
    assert f'<tr class=chosen><td><span data-key="plan.options.{i}.option" data-fmt="text">' in html
    assert summary["plan"]["target"]["chosen"] == chosen["option"]
    fig = html[html.index('id="fig-plan-frontier"'):]
    fig = fig[:fig.index("</figure>")]
    assert "<svg" in fig and "chosen: " in fig and "target CER" in fig and "frontier" in fig


def test_a_routed_run_alone_gives_the_measured_share_and_thresholds_from_its_own_up(built, tmp_path):
    from ocrbench.run.route import Route
    from ocrbench.run.routed import run_routed

    b = built
    db = tmp_path / "routed.sqlite"
    cards = [load_card(b["root"] / "fast"), load_card(b["root"] / "slow")]
    run_routed(b["pages"], cards, Route(b["fast"], b["slow"], b["x"]), store=db, options=RunOptions(prefetch=False))
    with RunStore(db) as st:
        infos = {st.run_info(i).recogniser: st.run_info(i) for i in st.run_ids()}
        fid, sid = infos[b["fast"]].run_id, infos[b["slow"]].run_id
        n_fast = sum(len(st.page_lines(fid, p)) for p in st.done_page_ids(fid))
        n_slow = sum(len(st.page_lines(sid, p)) for p in st.done_page_ids(sid))
    res = plan(PlanRequest(calibration=[str(db)], archive_store=db, pages=10_000, truth=b["truth"], draws=100,
                           price_core_hour=0.05, route=f"{b['fast']} -> {b['slow']}"))
    opts = [o for o in res.table.attrs["options"] if o["kind"] == "route"]
    # SLOW read only the routed lines, so no threshold below the run's is tried; at the run's own, the share is
    # the lines SLOW read over the lines FAST read, and the CER is 0 (the truth is the route's text there)
    assert opts and min(o["threshold"] for o in opts) == pytest.approx(b["x"])
    at_x = next(o for o in opts if o["threshold"] == pytest.approx(b["x"]))
    assert at_x["routed_share"] == pytest.approx(n_slow / n_fast) and at_x["cer"] == 0.0
    # SLOW has a cost model (fitted on the lines it re-read) but no CER of its own: it never read every line
    rows = {r["recogniser"]: r for r in res.table.to_dict("records")}
    assert pd.isna(rows[b["slow"]]["cer"]) and rows[b["slow"]]["core_hours"] > 0


def test_route_naming_an_uncalibrated_recogniser_is_refused(built):
    with pytest.raises(PlanError, match="none of the calibrated recognisers"):
        plan(_req(built, route="nope -> " + built["slow"]))
