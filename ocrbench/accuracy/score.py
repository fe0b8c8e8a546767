"""Score recognised text against ground truth: CER, WER, classes, confusions, amounts, intervals.

Definitions (every figure's recipe string repeats the choices made):

* **CER** = (S + D + I) / N: substitutions, deletions and insertions of a minimal
  Levenshtein alignment with unit costs, over N reference characters, where a
  character is a Unicode *code point* of the text *after* the normalisation
  profile (both sides normalised the same way).
* **WER** = the same over words, a word being a ``str.split()`` token.
* **Corpus** figures sum the counts over all pages, then divide (``agg=corpus``);
  the page-mean figures (``cer_page_mean``, ``agg=page-mean``) average the page
  rates of pages that have reference text.
* A page whose reference is empty has an undefined rate (NaN in the tables,
  ``None`` in the summary) but its edits still count in the corpus figures.

Lines: a page is a sequence of lines (given as one string with ``\\n`` breaks,
or as a list). Lines that are empty or only whitespace after normalisation are
dropped on both sides (they carry no text). When reference and hypothesis then
have the same number of lines, line *i* is aligned with line *i*. When the
counts differ, the page is aligned as one text, lines joined with ``\\n``, which
counts as a whitespace character (in N, in the edits and in the ``space``
class); such pages are marked ``pairing = "page"`` and listed in the summary
under ``line_count_mismatch``. The per-line table then holds one row for the
page with ``line_no`` missing.

Work done: without ``classes`` only distances are computed (rapidfuzz
``Levenshtein.distance``), so S, D, I and hits are not known and are left
missing. With ``classes`` the full alignment (``Levenshtein.editops``) gives
S/D/I/hits, per-class figures, the confusion pairs and the ledger-amount check.
"""

from __future__ import annotations

import math
import gc
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd
from rapidfuzz.distance import Levenshtein

from ocrbench import __version__
from ocrbench.errors import InputError
from ocrbench.ledger import amounts as _amounts
from ocrbench.accuracy.align import CLASSES, class_codes_of
from ocrbench.accuracy.normalise import DEFAULT_PROFILE, Profile, get_profile
from ocrbench.accuracy.recipe import Recipe, ci_tag, rec_tag
from ocrbench.accuracy.stats import bootstrap_ratio_cis

__all__ = ["Scores", "score_pages", "PageInput", "MAX_ALIGN_CHARS"]

PageInput = tuple[str, "Sequence[str] | str", "Sequence[str] | str"]

_OPS = ("subs", "dels", "ins")
_KIND = {"replace": 0, "delete": 1, "insert": 2}


@dataclass
class Scores:
    """Result of :func:`score_pages`.

    ``lines``: one row per aligned unit (a line pair, or a whole page when the
    line counts differ). ``pages``: one row per page. ``summary``: corpus
    figures with intervals and recipes (JSON-ready: no NaN, only None).
    ``confusions``: every (reference → hypothesis) pair with its count (classes
    only). ``amounts``: every reference amount with the aligned hypothesis text
    and whether its digits are right (classes only).
    """

    lines: pd.DataFrame
    pages: pd.DataFrame
    summary: dict
    confusions: pd.DataFrame | None = None
    amounts: pd.DataFrame | None = None


def _page_lines(x: Sequence[str] | str, norm) -> list[str]:
    text = x if isinstance(x, str) else "\n".join(x)
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    lines = norm(text).split("\n")
    if "" in lines or any(map(str.isspace, lines)):
        lines = [ln for ln in lines if ln and not ln.isspace()]
    return lines


def _rate(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    out = np.full(num.shape, np.nan)
    np.divide(num, den, out=out, where=den > 0)
    return out


def _opt(x: float | None) -> float | None:
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else float(x)


def _ratio(num: float, den: float) -> float | None:
    return float(num) / float(den) if den > 0 else None


def _around(value: float | None, ci: tuple[float | None, float | None]) -> tuple[float | None, float | None]:
    """The interval, widened if needed to contain the point estimate.

    A percentile bootstrap interval can, with few and very unequal pages, miss the
    estimate it belongs to; reporting an interval that excludes its own figure
    would confuse every later use (the planner checks low <= value <= high).
    """
    lo, hi = ci
    if value is None or lo is None or hi is None:
        return lo, hi
    return min(lo, value), max(hi, value)


def _int_array(values: np.ndarray, missing: np.ndarray | None = None) -> pd.arrays.IntegerArray:
    mask = np.zeros(len(values), dtype=bool) if missing is None else missing
    return pd.arrays.IntegerArray(np.asarray(values, dtype=np.int64), mask)


#: Longest unit (reference + hypothesis code points) the full alignment takes. Its edit script
#: costs about 300 bytes per character (measured: 1.5 GB for one 5,000,000-character line against
#: a short one), so this bounds one unit's alignment near 60 MB. Distances alone (``classes=False``)
#: need memory linear in the line and have no such limit.
MAX_ALIGN_CHARS = 200_000


def score_pages(pages: Sequence[PageInput], *, profile: str | Profile = DEFAULT_PROFILE,
                classes: bool = True, amounts: bool | None = None,
                recogniser_hash: str | None = None, top: int = 20, n_boot: int = 2000,
                level: float = 0.95, seed: int = 0, too_long: str = "raise") -> Scores:
    """Score pages given as ``(page_id, reference, hypothesis)``; each text a string or a list of lines.

    ``profile``: normalisation profile name (see :mod:`ocrbench.accuracy.normalise`).
    ``classes``: compute the full alignment for S/D/I/hits, per-class figures and
    the ``top`` confusion pairs (otherwise distances only, several times cheaper).
    ``amounts``: check ledger amounts (needs the alignment, so the class figures
    come with it; default: same as ``classes``). ``recogniser_hash`` goes into
    the recipes. Intervals: expanded percentile bootstrap over pages
    (:mod:`ocrbench.accuracy.stats`), ``n_boot`` resamples, ``level``, ``seed``;
    with fewer than 2 pages there is no interval (None). An interval that misses
    its own estimate (possible with few, very unequal pages) is widened to
    include it.

    Memory: with the alignment, a unit longer than :data:`MAX_ALIGN_CHARS` raises
    InputError naming the page (``too_long="raise"``), or its page is left out and
    listed in the summary's ``too_long_to_align`` (``too_long="skip"``).
    """
    if too_long not in ("raise", "skip"):
        raise ValueError(f"too_long must be 'raise' or 'skip', not {too_long!r}")
    # Many short-lived lists (one per line) would wake the cyclic garbage
    # collector again and again over a large heap; nothing here makes cycles.
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        return _score(pages, profile=profile, classes=classes, amounts=amounts,
                      recogniser_hash=recogniser_hash, top=top, n_boot=n_boot, level=level, seed=seed,
                      too_long=too_long)
    finally:
        if was_enabled:
            gc.enable()


@dataclass
class _Units:
    """The aligned units of the pages: a line pair each, or a whole page when the line counts differ."""

    page_ids: list[str]
    ur: list[str]             # unit references
    uh: list[str]             # unit hypotheses
    line_no: list[int]        # 1-based line number, 0 for a whole-page unit
    units_per_page: list[int]
    ref_nlines: list[int]
    hyp_nlines: list[int]
    by_line: list[bool]
    too_long: list[str]       # pages left out: a unit beyond MAX_ALIGN_CHARS


def _units(pages: Sequence[PageInput], norm, *, align: bool, too_long: str) -> _Units:
    u = _Units([], [], [], [], [], [], [], [], [])
    for pid, ref, hyp in pages:
        r = _page_lines(ref, norm)
        h = _page_lines(hyp, norm)
        nr, nh = len(r), len(h)
        pairs = list(zip(r, h)) if nr == nh else [("\n".join(r), "\n".join(h))]
        if align:
            longest = max((len(a) + len(b) for a, b in pairs), default=0)
            if longest > MAX_ALIGN_CHARS:
                if too_long == "raise":
                    raise InputError(pid, f"a line of {longest:,} characters (truth and recognised together) is "
                                          f"beyond the {MAX_ALIGN_CHARS:,} the character alignment takes in bounded "
                                          "memory; score without classes (distances only, memory linear in the "
                                          "line) or split the line")
                u.too_long.append(str(pid))
                continue
        u.page_ids.append(pid)
        u.ref_nlines.append(nr)
        u.hyp_nlines.append(nh)
        u.ur.extend(a for a, _ in pairs)
        u.uh.extend(b for _, b in pairs)
        u.line_no.extend(range(1, nr + 1) if nr == nh else [0])
        u.units_per_page.append(len(pairs))
        u.by_line.append(nr == nh)
    return u


def _score(pages, *, profile, classes, amounts, recogniser_hash, top, n_boot, level, seed, too_long) -> Scores:
    prof = get_profile(profile)
    want_amounts = classes if amounts is None else amounts
    align = classes or want_amounts
    u = _units(pages, prof.apply_text, align=align, too_long=too_long)
    page_ids, ur, uh, line_no = u.page_ids, u.ur, u.uh, u.line_no
    n_pages, n_units = len(page_ids), len(ur)
    upp = np.asarray(u.units_per_page, dtype=np.int64)
    unit_page = np.repeat(np.arange(n_pages), upp)

    # ---- distances (the cheap part, always done)
    dist = Levenshtein.distance
    char_edits = np.fromiter(map(dist, ur, uh), dtype=np.int64, count=n_units)
    ref_chars = np.fromiter(map(len, ur), dtype=np.int64, count=n_units)
    rw = list(map(str.split, ur))
    hw = list(map(str.split, uh))
    word_edits = np.fromiter(map(dist, rw, hw), dtype=np.int64, count=n_units)
    ref_words = np.fromiter(map(len, rw), dtype=np.int64, count=n_units)
    del rw, hw

    def per_page(x: np.ndarray) -> np.ndarray:
        return np.bincount(unit_page, weights=x, minlength=n_pages).astype(np.int64)

    p_chars, p_edits = per_page(ref_chars), per_page(char_edits)
    p_words, p_wedits = per_page(ref_words), per_page(word_edits)

    # ---- full alignment (classes, confusions, amounts)
    unit_sdi = page_cls = page_cls_ref = confusions = None   # page_cls: (pages, classes, 3) subs, dels, ins
    p_amounts = p_amounts_right = None
    amount_rows: list[tuple] = []
    scripts: dict[int, list] = {}
    if align:
        unit_sdi, page_cls, page_cls_ref, confusions = _align_units(
            ur, uh, char_edits, ref_chars, unit_page, p_chars, n_pages, scripts)
    if want_amounts:
        p_amounts, p_amounts_right, amount_rows = _check_amounts(u, upp, scripts)

    # ---- tables
    lines_df = _lines_frame(page_ids, unit_page, line_no, ur, uh, ref_chars, char_edits,
                            ref_words, word_edits, unit_sdi)
    pages_df = _pages_frame(page_ids, u.by_line, u.ref_nlines, u.hyp_nlines, p_chars, p_edits, p_words, p_wedits,
                            page_cls, page_cls_ref, p_amounts, p_amounts_right)
    summary = _summary(pages_df, prof=prof, page_cls=page_cls, page_cls_ref=page_cls_ref,
                       p_amounts=p_amounts, p_amounts_right=p_amounts_right, confusions=confusions,
                       top=top, recogniser_hash=recogniser_hash, n_boot=n_boot, level=level, seed=seed,
                       n_units=n_units, align=align)
    summary["too_long_to_align"] = u.too_long
    amounts_df = None
    if want_amounts:
        amounts_df = _rows_frame(amount_rows, ["page_id", "line_no", "kind", "ref", "hyp", "right"],
                                 ints=("line_no",), bools=("right",))
        amounts_df["line_no"] = amounts_df["line_no"].where(amounts_df["line_no"] > 0)
    return Scores(lines=lines_df, pages=pages_df, summary=summary, confusions=confusions, amounts=amounts_df)


def _check_amounts(u: _Units, upp: np.ndarray, scripts: dict[int, list]):
    """Per page: amounts found in the reference and amounts whose digits the hypothesis has right, and rows."""
    n_pages = len(u.page_ids)
    p_amounts = np.zeros(n_pages, dtype=np.int64)
    p_amounts_right = np.zeros(n_pages, dtype=np.int64)
    rows: list[tuple] = []
    find, check = _amounts.find_amounts_in_lines, _amounts.check_amounts
    first = np.concatenate([[0], np.cumsum(upp)])
    for p in range(n_pages):
        s0, s1 = int(first[p]), int(first[p + 1])
        if s0 == s1:
            continue
        hits = find(u.ur[s0:s1])
        if not hits:
            continue
        by_unit: dict[int, list] = {}
        for k, am in hits:
            by_unit.setdefault(s0 + k, []).append(am)
        for unit, found in by_unit.items():
            script = scripts.get(unit)
            if script is None:   # unit without edits: every amount is right
                p_amounts[p] += len(found)
                p_amounts_right[p] += len(found)
                rows.extend((u.page_ids[p], u.line_no[unit], am.kind, am.text, am.text, True) for am in found)
                continue
            for am, htext, ok in check(u.ur[unit], u.uh[unit], script, found):
                p_amounts[p] += 1
                p_amounts_right[p] += ok
                rows.append((u.page_ids[p], u.line_no[unit], am.kind, am.text, htext, ok))
    return p_amounts, p_amounts_right, rows


def _rows_frame(rows: list[tuple], columns: list[str], *, ints: tuple[str, ...] = (),
                bools: tuple[str, ...] = ()) -> pd.DataFrame:
    """A DataFrame from row tuples, text columns kept as plain Python strings (object dtype: no conversion)."""
    cols = list(zip(*rows)) if rows else [()] * len(columns)
    data: dict[str, Any] = {}
    for name, values in zip(columns, cols):
        if name in ints:
            data[name] = pd.array(np.asarray(values, dtype=np.int64), dtype="Int64")
        elif name in bools:
            data[name] = np.asarray(values, dtype=bool)
        else:
            data[name] = pd.Series(np.asarray(values, dtype=object), dtype=object)
    return pd.DataFrame(data)


def _code_points(text: str) -> np.ndarray:
    return np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype=np.uint32)


def _align_units(ur, uh, char_edits, ref_chars, unit_page, p_chars, n_pages, scripts):
    """Full alignment of every unit with edits: S/D/I per unit, per page and class, confusions.

    The edit scripts are collected as plain integers per unit (C-level ``zip``),
    then characters and classes are looked up for all edits at once with numpy,
    through the code points of the concatenated references and hypotheses.
    """
    n_units = len(ur)
    nc = len(CLASSES)
    editops = Levenshtein.editops
    e_unit: list[int] = []
    e_tag: list[str] = []
    e_i: list[int] = []
    e_j: list[int] = []
    for u in np.flatnonzero(char_edits).tolist():
        ops = editops(ur[u], uh[u]).as_list()
        scripts[u] = ops
        tags, ii, jj = zip(*ops)
        e_tag.extend(tags)
        e_i.extend(ii)
        e_j.extend(jj)
        e_unit.extend([u] * len(ops))
    eu = np.asarray(e_unit, dtype=np.int64)
    kind = np.zeros(len(e_tag), dtype=np.int64)
    if e_tag:
        t = np.asarray(e_tag)
        kind[t == "delete"] = 1
        kind[t == "insert"] = 2
    ref_off = np.concatenate([[0], np.cumsum(ref_chars)])[:-1]
    hyp_len = np.fromiter(map(len, uh), dtype=np.int64, count=n_units)
    hyp_off = np.concatenate([[0], np.cumsum(hyp_len)])[:-1]
    ref_cp = _code_points("".join(ur))
    hyp_cp = _code_points("".join(uh))
    ref_cls = class_codes_of(ref_cp)
    gi = ref_off[eu] + np.asarray(e_i, dtype=np.int64)
    gj = hyp_off[eu] + np.asarray(e_j, dtype=np.int64)
    is_ins = kind == 2
    is_del = kind == 1
    gi_safe = np.where(is_ins, 0, gi)
    gj_safe = np.where(is_del, 0, gj)
    a_cp = np.where(is_ins, -1, ref_cp[gi_safe].astype(np.int64) if len(ref_cp) else -1)
    b_cp = np.where(is_del, -1, hyp_cp[gj_safe].astype(np.int64) if len(hyp_cp) else -1)
    cls = np.where(is_ins, class_codes_of(np.maximum(b_cp, 0).astype(np.uint32)),
                   class_codes_of(np.maximum(a_cp, 0).astype(np.uint32)))
    unit_sdi = np.bincount(eu * 3 + kind, minlength=n_units * 3).reshape(n_units, 3)
    page_cls = np.bincount(unit_page[eu] * (nc * 3) + cls * 3 + kind,
                           minlength=n_pages * nc * 3).reshape(n_pages, nc, 3)
    char_page = np.repeat(np.arange(n_pages), p_chars)
    page_cls_ref = np.bincount(char_page * nc + ref_cls, minlength=n_pages * nc).reshape(n_pages, nc)
    # Confusion pairs: (reference code point, hypothesis code point), -1 for none.
    key = (a_cp + 1) * 0x110001 + (b_cp + 1)
    uniq, counts = np.unique(key, return_counts=True)
    order = np.argsort(-counts, kind="stable")
    rows = []
    for k, n in zip(uniq[order].tolist(), counts[order].tolist()):
        a, b = divmod(k, 0x110001)
        ra = chr(a - 1) if a else ""
        hb = chr(b - 1) if b else ""
        rows.append((ra, hb, "sub" if ra and hb else ("del" if ra else "ins"), n))
    confusions = _rows_frame(rows, ["ref", "hyp", "op", "count"], ints=("count",))
    return unit_sdi, page_cls, page_cls_ref, confusions


def _lines_frame(page_ids, unit_page, line_no, ur, uh, ref_chars, char_edits, ref_words, word_edits,
                 unit_sdi) -> pd.DataFrame:
    n = len(ur)
    ln = np.asarray(line_no, dtype=np.int64)
    pid = np.asarray(page_ids, dtype=object)[unit_page] if n else np.zeros(0, dtype=object)
    cols: dict[str, Any] = {
        "page_id": pd.Series(pid, dtype=object),
        "line_no": _int_array(ln, ln == 0),
        "ref_chars": ref_chars, "char_edits": char_edits, "cer": _rate(char_edits, ref_chars),
        "ref_words": ref_words, "word_edits": word_edits, "wer": _rate(word_edits, ref_words),
    }
    missing = np.ones(n, dtype=bool)
    if unit_sdi is not None:
        for k, name in enumerate(_OPS):
            cols[name] = _int_array(unit_sdi[:, k])
        cols["hits"] = _int_array(ref_chars - unit_sdi[:, 0] - unit_sdi[:, 1])
    else:
        zeros = np.zeros(n, dtype=np.int64)
        for name in (*_OPS, "hits"):
            cols[name] = _int_array(zeros, missing)
    cols["ref"] = pd.Series(np.asarray(ur, dtype=object), dtype=object)
    cols["hyp"] = pd.Series(np.asarray(uh, dtype=object), dtype=object)
    return pd.DataFrame(cols)


def _pages_frame(page_ids, by_line, ref_nlines, hyp_nlines, p_chars, p_edits, p_words, p_wedits,
                 page_cls, page_cls_ref, p_amounts, p_amounts_right) -> pd.DataFrame:
    n = len(page_ids)
    cols: dict[str, Any] = {
        "page_id": np.asarray(page_ids, dtype=object),
        "pairing": np.where(np.asarray(by_line, dtype=bool), "line", "page").astype(object),
        "ref_lines": np.asarray(ref_nlines, dtype=np.int64),
        "hyp_lines": np.asarray(hyp_nlines, dtype=np.int64),
        "ref_chars": p_chars, "char_edits": p_edits, "cer": _rate(p_edits, p_chars),
        "ref_words": p_words, "word_edits": p_wedits, "wer": _rate(p_wedits, p_words),
    }
    if page_cls is not None:
        s = page_cls[:, :, 0].sum(1)
        d = page_cls[:, :, 1].sum(1)
        i = page_cls[:, :, 2].sum(1)
        cols.update(subs=_int_array(s), dels=_int_array(d), ins=_int_array(i), hits=_int_array(p_chars - s - d))
        for c, name in enumerate(CLASSES):
            cols[f"ref_{name}"] = page_cls_ref[:, c]
            cols[f"err_{name}"] = page_cls[:, c, 0] + page_cls[:, c, 1]
            cols[f"ins_{name}"] = page_cls[:, c, 2]
    else:
        zeros, missing = np.zeros(n, dtype=np.int64), np.ones(n, dtype=bool)
        for name in (*_OPS, "hits"):
            cols[name] = _int_array(zeros, missing)
    if p_amounts is not None:
        cols["amounts"] = p_amounts
        cols["amounts_right"] = p_amounts_right
    return pd.DataFrame(cols)


def _summary(pages_df: pd.DataFrame, *, prof: Profile, page_cls, page_cls_ref, p_amounts, p_amounts_right,
             confusions, top, recogniser_hash, n_boot, level, seed, n_units, align) -> dict:
    ci = ci_tag(n_boot, level, seed)
    rec = rec_tag(recogniser_hash)
    base = Recipe(metric="cer", unit="codepoint", profile=prof.tag, ci=ci, rec=rec)

    num = [pages_df["char_edits"].to_numpy(), pages_df["word_edits"].to_numpy()]
    den = [pages_df["ref_chars"].to_numpy(), pages_df["ref_words"].to_numpy()]
    names = ["cer", "wer"]
    if page_cls is not None:
        for c, name in enumerate(CLASSES):
            num += [page_cls[:, c, 0] + page_cls[:, c, 1], page_cls[:, c, 2]]
            den += [page_cls_ref[:, c], page_cls_ref[:, c]]
            names += [f"err:{name}", f"ins:{name}"]
    if p_amounts is not None:
        num.append(p_amounts_right)
        den.append(p_amounts)
        names.append("amounts")
    cis = dict(zip(names, bootstrap_ratio_cis(np.column_stack(num), np.column_stack(den),
                                               n_boot=n_boot, level=level, seed=seed)))

    tot_chars = int(pages_df["ref_chars"].sum())
    tot_edits = int(pages_df["char_edits"].sum())
    tot_words = int(pages_df["ref_words"].sum())
    tot_wedits = int(pages_df["word_edits"].sum())
    recipes = {
        "cer": str(base),
        "wer": str(base.with_(metric="wer", unit="word")),
        "cer_page_mean": str(base.with_(agg="page-mean", ci="none")),
        "wer_page_mean": str(base.with_(metric="wer", unit="word", agg="page-mean", ci="none")),
    }
    cer, wer = _ratio(tot_edits, tot_chars), _ratio(tot_wedits, tot_words)
    cer_low, cer_high = _around(cer, cis["cer"])
    wer_low, wer_high = _around(wer, cis["wer"])
    s: dict[str, Any] = {
        "cer": cer, "cer_low": cer_low, "cer_high": cer_high,
        "wer": wer, "wer_low": wer_low, "wer_high": wer_high,
        "cer_page_mean": _opt(float(pages_df["cer"].mean())) if pages_df["cer"].notna().any() else None,
        "wer_page_mean": _opt(float(pages_df["wer"].mean())) if pages_df["wer"].notna().any() else None,
        "pages": int(len(pages_df)),
        "aligned_units": int(n_units),
        "ref_chars": tot_chars, "char_edits": tot_edits,
        "ref_words": tot_words, "word_edits": tot_wedits,
        "subs": None, "dels": None, "ins": None, "hits": None,
        "line_count_mismatch": pages_df.loc[pages_df["pairing"] == "page", "page_id"].tolist(),
        "empty_reference": pages_df.loc[pages_df["ref_chars"] == 0, "page_id"].tolist(),
        "profile": prof.name,
        "profile_summary": prof.summary,
        "classes": None, "confusions": None, "amounts": None,
        "interval": {"method": "expanded percentile bootstrap, pages resampled", "n_boot": n_boot,
                     "level": level, "seed": seed},
        "recogniser_hash": recogniser_hash,
        "ocrbench_version": __version__,
        "recipe": recipes["cer"],
        "recipes": recipes,
    }
    if align and page_cls is not None:
        s["subs"] = int(page_cls[:, :, 0].sum())
        s["dels"] = int(page_cls[:, :, 1].sum())
        s["ins"] = int(page_cls[:, :, 2].sum())
        s["hits"] = tot_chars - s["subs"] - s["dels"]
        cls_out = _class_summary(page_cls, page_cls_ref, cis, base, recipes)
        s["classes"] = cls_out
        s["confusions"] = [
            {"ref": a, "hyp": b, "op": op, "count": int(n)}
            for a, b, op, n in confusions.head(top).itertuples(index=False, name=None)
        ]
    if p_amounts is not None:
        found, right = int(p_amounts.sum()), int(p_amounts_right.sum())
        r_am = str(base.with_(metric="amounts-right", unit="amount"))
        recipes["amounts-right"] = r_am
        share = _ratio(right, found)
        lo, hi = _around(share, cis["amounts"])
        s["amounts"] = {"found": found, "right": right, "share_right": share, "low": lo, "high": hi,
                        "recipe": r_am}
    return s


def _class_summary(page_cls: np.ndarray, page_cls_ref: np.ndarray, cis: dict, base: Recipe,
                   recipes: dict) -> dict:
    """Per character class: truth characters, errors (subs + dels), insertions, rates with intervals."""
    cls_out = {}
    for c, name in enumerate(CLASSES):
        ref_n = int(page_cls_ref[:, c].sum())
        sub_n, del_n, ins_n = (int(page_cls[:, c, k].sum()) for k in range(3))
        r_err = str(base.with_(metric=f"class-error/{name}"))
        r_ins = str(base.with_(metric=f"class-insert/{name}"))
        cls_out[name] = {
            "ref_chars": ref_n, "subs": sub_n, "dels": del_n, "errors": sub_n + del_n,
            "rate": (rate := _ratio(sub_n + del_n, ref_n)),
            **dict(zip(("low", "high"), _around(rate, cis[f"err:{name}"]))),
            "inserted": ins_n, "ins_rate": (ins_rate := _ratio(ins_n, ref_n)),
            **dict(zip(("ins_low", "ins_high"), _around(ins_rate, cis[f"ins:{name}"]))),
            "recipe": r_err, "ins_recipe": r_ins,
        }
        recipes[f"class-error/{name}"] = r_err
        recipes[f"class-insert/{name}"] = r_ins
    return cls_out
