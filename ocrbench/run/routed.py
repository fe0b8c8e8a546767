"""A routed run (``ocrbench run ... --route "FAST -> SLOW if doubt > X"``), page by page, into the run store.

Per page: load and segment once; FAST reads every line; the review queue's doubt
of each line is computed from FAST's reading (:mod:`ocrbench.run.route`); SLOW
re-reads the lines whose doubt is above X. Three runs record it, each with the
route in its settings so none is mistaken for a plain run:

* the FAST run: every line, as a plain run would hold it, with its times;
* the SLOW run: only the routed lines, under their own line numbers, with the
  times SLOW took on them (a page with no routed line is done with no lines);
* the route run (kind ``route``, named ``FAST->SLOW``): every line's kept
  reading, the SLOW reading on routed lines and the FAST one elsewhere; which
  was kept is therefore exactly "the SLOW run holds this line". Its page times
  are FAST's page time plus SLOW's recognition time, its model time the sum.

Because the SLOW run holds some lines only, ``score``, ``review`` and ``report``
leave it out of their default run lists (a run whose settings say
``route_role = "slow"``); name it with ``--run`` to see it.

Resume: the three runs are found again by card hashes, settings and input
folder (the route run's card hash is the route's: both card hashes and X).
A page done in all three is skipped; where FAST already read a page, its stored
reading is used again and never overwritten.
"""

from __future__ import annotations

import time
from dataclasses import replace
from pathlib import Path
from typing import Callable, Sequence

from ocrbench.errors import OcrbenchError
from ocrbench.pages import Layout
from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.recognisers.base import Clock
from ocrbench.recognisers.card import Card
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.run.engine import (LoadedPage, PageOutcome, ProgressEvent, RunOptions, RunState, RunSummary, RunWriter,
                                 as_run_options, host_info, load_and_segment, load_cards, open_inputs, open_run,
                                 read_page, with_listing)
from ocrbench.run.route import Route, line_doubts, merge_readings, routed_lines
from ocrbench.store import LineRecord, PageRecord, RunStore


def pick_cards(route: Route, cards: Sequence[Card], given: Sequence[Path | str | Card]) -> tuple[Card, Card]:
    """The FAST and SLOW cards of a route among the run's cards (by name, or by the path given for it)."""
    def find(ref: str) -> Card:
        for c, g in zip(cards, given):
            if ref == c.name or (not isinstance(g, Card) and Path(ref).resolve() in (Path(g).resolve(), c.path,
                                                                                     c.folder)):
                return c
        names = ", ".join(c.name for c in cards)
        raise OcrbenchError(f"--route names {ref!r}, which is none of the run's recognisers ({names})")
    return find(route.fast), find(route.slow)


def run_routed(target: Path | str, cards: Sequence[Card | Path | str], route: Route, *,
               store: RunStore | Path | str, options: RunOptions | None = None, clock: Clock = time.perf_counter,
               progress: Callable[[ProgressEvent], None] | None = None, lexicon: Lexicon | None = None,
               fresh: bool = False) -> RunSummary:
    """Read every page of ``target`` along ``route`` into ``store``; the summary lists FAST, SLOW and the route."""
    options = as_run_options(options)
    loaded_cards = load_cards(cards)
    fast, slow = pick_cards(route, loaded_cards, cards)
    listing, input_dir, st, own = open_inputs(target, options, store)
    refs = listing.refs
    try:
        import onnxruntime as ort

        engine = f"onnxruntime {ort.__version__}"
        settings = options.settings()
        states = []
        for card, role in ((fast, "fast"), (slow, "slow")):
            rec = open_recogniser(card, options=options.engine, warm_up=options.warm_up)
            states.append(open_run(st, card, rec, settings={**settings, "route": str(route), "route_role": role},
                                   input_dir=input_dir, fresh=fresh, engine=engine,
                                   host=lambda rec=rec: host_info(rec)))
        route_card = replace(fast, name=f"{fast.name}->{slow.name}", kind="route",
                             card_hash=route.identity(fast.card_hash, slow.card_hash))
        states.append(open_run(st, route_card, None, settings={**settings, "route": str(route), "route_role": "kept",
                                                                "route_fast": fast.card_hash,
                                                                "route_slow": slow.card_hash},
                               input_dir=input_dir, fresh=fresh, engine=engine,
                               host=lambda: host_info(states[0].rec)))
        w = RunWriter(refs, states, st, clock, progress, input_dir)
        w.emit("start")
        for ref in refs:
            if ref.id in w.skipped_ids:
                w.skip(ref.id)
                continue
            loaded = load_and_segment(ref, options=options, clock=clock)
            todo = [s for s in states if ref.id not in s.done]
            outcomes = route_page(loaded, states, route, st=st, clock=clock, lexicon=lexicon)
            w.write(ref.id, [(s, o) for s, o in zip(states, outcomes) if s in todo])
        return with_listing(w.finish(), listing)
    finally:
        if own:
            st.close()


def route_page(loaded: LoadedPage, states: Sequence[RunState], route: Route, *, st: RunStore,
               clock: Clock = time.perf_counter, lexicon: Lexicon | None = None) -> list[PageOutcome]:
    """Outcomes of one page for the FAST, SLOW and route runs (in that order); stored readings are reused."""
    fast_s, slow_s, _ = states
    page_id = loaded.page_id
    if page_id in fast_s.done:
        fast_o = _stored_outcome(st, fast_s.run_id, page_id, loaded)
    else:
        fast_o = read_page(loaded, [fast_s.rec], clock=clock)[0]
    if fast_o.failed:
        return [fast_o, fast_o, fast_o]
    texts = [ln.text for ln in fast_o.lines]
    doubts = line_doubts(texts, [ln.confidence for ln in fast_o.lines], lexicon=lexicon)
    pick = routed_lines(doubts, route.threshold)
    if page_id in slow_s.done:
        slow_o = _stored_outcome(st, slow_s.run_id, page_id, loaded)
    else:
        sub = LoadedPage(loaded.ref, loaded.content_hash, loaded.t_load, loaded.t_segment, loaded.width,
                         loaded.height, Layout([loaded.layout.lines[i] for i in pick], loaded.layout.skew_degrees,
                                               loaded.layout.deskewed))
        slow_o = read_page(sub, [slow_s.rec], clock=clock)[0]
        if slow_o.failed:
            failed = replace(fast_o.page, status="failed", error=f"{route.slow}: {slow_o.page.error}")
            return [fast_o, slow_o, PageOutcome(failed)]
        for ln, i in zip(slow_o.lines, pick):
            ln.line_no = i + 1
        slow_o.page.n_lines = len(pick)
    if [ln.line_no - 1 for ln in slow_o.lines] != pick:  # a stored reading made under other settings
        raise OcrbenchError(f"{page_id}: the stored {route.slow} reading holds other lines than the route picks")
    merged = merge_readings(texts, [ln.confidence for ln in fast_o.lines], pick,
                            [ln.text for ln in slow_o.lines], [ln.confidence for ln in slow_o.lines])
    by_no = {ln.line_no: ln for ln in slow_o.lines}
    lines = [replace(by_no[ln.line_no]) if k == "slow" else replace(ln) for ln, k in zip(fast_o.lines, merged.kept)]
    fp, sp = fast_o.page, slow_o.page
    slow_read = (sp.t_total or 0.0) - (sp.t_load or 0.0) - (sp.t_segment or 0.0)
    page = replace(fp, t_preprocess=(fp.t_preprocess or 0) + (sp.t_preprocess or 0),
                   t_encode=(fp.t_encode or 0) + (sp.t_encode or 0), t_steps=(fp.t_steps or 0) + (sp.t_steps or 0),
                   t_collapse=(fp.t_collapse or 0) + (sp.t_collapse or 0), t_total=(fp.t_total or 0) + slow_read,
                   finished_at=None)
    return [fast_o, slow_o, PageOutcome(page, lines)]


def _stored_outcome(st: RunStore, run_id: int, page_id: str, loaded: LoadedPage) -> PageOutcome:
    """A reading of a page as the store holds it (a resumed route never reads a done page twice)."""
    rows = st.page_lines(run_id, page_id)
    boxes = loaded.layout.lines if loaded.layout is not None else []
    lines = [LineRecord(line_no=no, x0=int(b.x0), y0=int(b.y0), x1=int(b.x1), y1=int(b.y1), width_px=0, text=t,
                        text_post=None, confidence=float(c) if c is not None else float("nan"),
                        char_conf=list(cc or []), n_chars=len(t))
             for no, t, c, cc in rows for b in [boxes[no - 1]]]
    pages = st.read_frames([run_id])["pages"]
    row = pages[pages["page_id"] == page_id].iloc[0]
    times = {k: (None if row[k] != row[k] else float(row[k])) for k in
             ("t_load", "t_segment", "t_preprocess", "t_encode", "t_steps", "t_collapse", "t_postprocess", "t_total")}
    page = PageRecord(page_id=page_id, path=loaded.ref.display(), content_hash=loaded.content_hash, status="done",
                      width=loaded.width, height=loaded.height, n_lines=len(lines),
                      skew_degrees=loaded.layout.skew_degrees if loaded.layout is not None else None,
                      collection=loaded.ref.collection,
                      flags=None if loaded.flags is None else ",".join(loaded.flags), **times)
    return PageOutcome(page, lines)
