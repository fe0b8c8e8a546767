"""Measured effect of post-processing, and how well the ledger arithmetic catches misread amounts.

Two questions a digitisation lead asks before switching post-processing on:

1. Does it help, and does it hurt any kind of character? :func:`cer_before_after`
   scores raw and post-processed text against the truth with the accuracy
   module, per character class, and flags any class whose CER rose by more
   than the paired interval allows.
2. If we rely on page arithmetic to find misread amounts on pages nobody has
   transcribed, how many does it catch? :func:`amount_misread_detection`
   compares recognised pages with their truth; :func:`simulate_misreads`
   makes test pages with known misreads from ground truth.
"""

from __future__ import annotations

import random
from dataclasses import dataclass
from typing import Any, Sequence

import pandas as pd

from ocrbench.accuracy.stats import wilson_interval
from ocrbench.ledger import balance as _ledger


# --------------------------------------------------------------------------- simulated misreads


def alter_amount_digit(line: str, form: str, rng: random.Random, *, decimal_mark: str = ".") -> str | None:
    """``line`` with one digit of its trailing amount replaced by another digit (None if it has none)."""
    a = _ledger.find_amount(line, form, decimal_mark=decimal_mark)
    if a is None:
        return None
    positions = [i for i in range(a.start, a.end) if line[i].isdigit()]
    if not positions:
        return None
    i = rng.choice(positions)
    new = rng.choice([d for d in "0123456789" if d != line[i]])
    return line[:i] + new + line[i + 1:]


def simulate_misreads(pages: Sequence[Sequence[str]], *, rate: float | None = None, per_page: int | None = None,
                      seed: int = 0, decimal_mark: str = ".") -> list[tuple[list[str], list[int]]]:
    """Copies of ground-truth pages with digits of some amounts altered, and which lines were altered.

    Either every amount is misread independently with probability ``rate`` (the
    model of :func:`ledger.estimate_misreads`), or exactly ``per_page`` amount
    lines per page are. Altered line numbers are 0-based.
    """
    if (rate is None) == (per_page is None):
        raise ValueError("give exactly one of rate= or per_page=")
    rng = random.Random(seed)
    out = []
    for page in pages:
        lines = list(page)
        bal = _ledger.check_page(lines, decimal_mark=decimal_mark)
        amount_nos = [ln.line_no for ln in bal.amount_lines]
        if rate is not None:
            chosen = [n for n in amount_nos if rng.random() < rate]
        else:
            chosen = sorted(rng.sample(amount_nos, min(per_page or 0, len(amount_nos))))
        done = []
        for n in chosen:
            new = alter_amount_digit(lines[n], bal.form, rng, decimal_mark=decimal_mark)  # type: ignore[arg-type]
            if new is not None:
                lines[n] = new
                done.append(n)
        out.append((lines, done))
    return out


# --------------------------------------------------------------------------- detection


@dataclass(frozen=True)
class Detection:
    """How well the arithmetic check finds misread amounts (truth known).

    A *misread amount line*: the truth line carries an amount and the recognised
    line at the same position carries a different one or none. It is *detected*
    when its page is not reported balanced; *located* when the queue's ledger
    part points at that very line (amount unreadable, or one digit there would
    balance the page).
    """

    pages: int
    pages_skipped: int             # line counts differ from the truth: not paired
    misread_lines: int
    detected: int
    located: int
    detection_rate: float | None
    detection_low: float | None
    detection_high: float | None
    location_rate: float | None
    clean_pages: int               # pages without misread amounts
    false_alarms: int              # ... that were nevertheless not balanced
    level: float

    def to_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def misread_amount_lines(truth: Sequence[str], hyp: Sequence[str], *, decimal_mark: str = ".") -> list[int]:
    """0-based numbers of the lines whose amount (in the truth page's form) was misread (truth first)."""
    tb = _ledger.check_page(list(truth), decimal_mark=decimal_mark)
    if tb.form is None:
        return []
    out = []
    for ln in tb.amount_lines:
        h = _ledger.find_amount(hyp[ln.line_no], tb.form, decimal_mark=decimal_mark)
        if h is None or h.value != ln.amount.value:  # type: ignore[union-attr]
            out.append(ln.line_no)
    return out


def amount_misread_detection(truth_pages: Sequence[Sequence[str]], hyp_pages: Sequence[Sequence[str]], *,
                             decimal_mark: str = ".", level: float = 0.95) -> Detection:
    """Detection rate of the arithmetic check for lines with a misread amount, with a Wilson interval.

    Truth pages first, recognised (or simulated) pages second, page for page.
    """
    from ocrbench.postprocess.review import ledger_parts

    if len(hyp_pages) != len(truth_pages):
        raise ValueError(f"{len(hyp_pages)} recognised pages but {len(truth_pages)} truth pages")
    misread = detected = located = skipped = clean = false_alarms = 0
    for truth, hyp in zip(truth_pages, hyp_pages):
        if len(hyp) != len(truth):
            skipped += 1
            continue
        bad = misread_amount_lines(truth, hyp, decimal_mark=decimal_mark)
        hb = _ledger.check_page(list(hyp), decimal_mark=decimal_mark)
        flagged = hb.status != _ledger.BALANCED
        if not bad:
            clean += 1
            false_alarms += flagged
            continue
        parts = ledger_parts(hb)
        misread += len(bad)
        detected += len(bad) * flagged
        located += sum(parts.get(n, (0.0, ""))[0] >= 1.0 for n in bad)
    ci = wilson_interval(detected, misread, level=level)
    return Detection(pages=len(hyp_pages), pages_skipped=skipped, misread_lines=misread, detected=detected,
                     located=located, detection_rate=detected / misread if misread else None,
                     detection_low=ci[0] if ci else None, detection_high=ci[1] if ci else None,
                     location_rate=located / misread if misread else None, clean_pages=clean,
                     false_alarms=false_alarms, level=level)


# --------------------------------------------------------------------------- CER before / after


def cer_before_after(pages: Sequence[tuple[str, Sequence[str] | str, Sequence[str] | str, Sequence[str] | str]], *,
                     profile: str | None = None, n_boot: int = 2000, level: float = 0.95,
                     seed: int = 0) -> pd.DataFrame:
    """CER of raw and post-processed text against the truth, overall and per character class.

    ``pages``: (page_id, truth, raw, post), truth first; each text a list of
    lines or one string. Both sides are scored by
    :func:`ocrbench.accuracy.score.score_pages` with the same ``profile`` (the
    accuracy module's default when None) and compared page-paired with
    :func:`ocrbench.accuracy.stats.paired_comparison`.

    Class CER: the edits charged to a class over the truth characters of that
    class, where substitutions and deletions are charged to the class of the
    truth character and insertions to the class of the inserted character (the
    accuracy module's ``err_<class>`` and ``ins_<class>`` columns). So defined,
    the class figures add up to the overall CER when weighted by class size.

    Returns one row per class (``"all"`` first): ref_chars, edits_before,
    edits_after, cer_before, cer_after, diff (after - before), low and high (the
    paired bootstrap interval of diff), p_value, and ``raised``: True when the
    whole interval lies above zero, i.e. post-processing made that class worse
    beyond what chance explains. Classes absent from the truth have no rate (NaN)
    and are never ``raised``.
    """
    from ocrbench.accuracy.align import CLASSES
    from ocrbench.accuracy.score import score_pages
    from ocrbench.accuracy.stats import paired_comparison

    kw: dict[str, Any] = {"classes": True, "amounts": False, "n_boot": n_boot, "level": level, "seed": seed}
    if profile is not None:
        kw["profile"] = profile
    before = score_pages([(pid, truth, raw) for pid, truth, raw, _ in pages], **kw).pages
    after = score_pages([(pid, truth, post) for pid, truth, _, post in pages], **kw).pages

    def frame(df: pd.DataFrame, cls: str | None) -> pd.DataFrame:
        if cls is None:
            return df[["page_id", "char_edits", "ref_chars"]]
        return pd.DataFrame({"page_id": df["page_id"],
                             "char_edits": df[f"err_{cls}"].astype("int64") + df[f"ins_{cls}"].astype("int64"),
                             "ref_chars": df[f"ref_{cls}"].astype("int64")})

    rows = []
    for cls in ("all", *CLASSES):
        fb, fa = frame(before, None if cls == "all" else cls), frame(after, None if cls == "all" else cls)
        ref = int(fb["ref_chars"].sum())
        eb, ea = int(fb["char_edits"].sum()), int(fa["char_edits"].sum())
        row: dict[str, Any] = {"class": cls, "ref_chars": ref, "edits_before": eb, "edits_after": ea,
                               "cer_before": eb / ref if ref else float("nan"),
                               "cer_after": ea / ref if ref else float("nan"),
                               "diff": float("nan"), "low": None, "high": None, "p_value": None, "raised": False}
        if ref:
            cmp = paired_comparison(fa, fb, metric="cer", n_boot=n_boot, level=level, seed=seed,
                                    names=("post", "raw"))
            row.update(diff=cmp["diff"], low=cmp["low"], high=cmp["high"], p_value=cmp["p_value"],
                       raised=bool(cmp["low"] is not None and cmp["low"] > 0))
        rows.append(row)
    return pd.DataFrame(rows)
