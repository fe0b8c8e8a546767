"""People in the plan: how many hours of reading and correcting the archive needs, what they cost, and
whether the correctors available finish within the deadline.

Three review modes (the reading rates are stated assumptions, each settable):

* ``full`` — every line is read against its image (the reading rate of
  :class:`ocrbench.postprocess.review.ReviewRate`, the same one ``ocrbench
  review`` times its queue with: 4 s per line plus 1 s per 10 characters), and
  every character error is corrected (``seconds_per_error``). Errors left: none
  (assumed: a full read finds them).
* ``targeted`` — only the head of the review queue is read (``review_share`` of
  the lines), which holds ``catch_rate`` of the errors (measure it with
  ``ocrbench review --truth``: "share of error lines caught"); the errors it
  catches are corrected, the rest stay in the text.
* ``none`` — nobody reads; every error stays.

Money is never made up: an item with hours but no price is *unpriced* and named,
and a total with an unpriced or unknown part is not a total (``cost`` is None,
so "meets budget" cannot say yes).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ocrbench.errors import PlanError
from ocrbench.postprocess.review import ReviewRate

#: Seconds in a week (deadlines are compared with weeks of correctors' time).
WEEK = 7 * 86400.0

REVIEW_MODES = ("full", "targeted", "none")

#: Default seconds a person needs per character error (see :class:`Correction`).
DEFAULT_SECONDS_PER_ERROR = 10.0

#: A full-time week: 37.5 contracted hours (common practice for office work in the UK, from memory). Breaks and
#: other duties are not subtracted: give the hours each corrector really corrects (--corrector-hours-per-week).
DEFAULT_HOURS_PER_WEEK = 37.5

#: Targeted review reads this share of the lines (the head of the doubt queue) unless told otherwise.
DEFAULT_REVIEW_SHARE = 0.10

_RATE = ReviewRate()

#: The reading rate of a full review: that of ``ocrbench review`` (see ReviewRate for its reasoning).
DEFAULT_SECONDS_PER_LINE = _RATE.seconds_per_line
DEFAULT_CHARS_PER_SECOND = _RATE.chars_per_second


@dataclass(frozen=True)
class Correction:
    """Human review and correction: the mode, the rates (stated assumptions, each settable) and the people.

    ``seconds_per_error`` defaults to :data:`DEFAULT_SECONDS_PER_ERROR` (10 s).
    Assumption and its reasoning: the edit itself (look at the error, point,
    click, retype a character) is about 3-4 s by the keystroke-level model's
    operator times (mental act 1.35 s, pointing 1.1 s, homing 0.4 s, key
    presses 0.2-0.3 s; Card, Moran & Newell 1980, from memory), and finding the
    error by comparing the text with the scan and re-checking the line roughly
    doubles to triples that; 10 s per error is the round figure in common
    practice for proof-reading with the image side by side. Measure your own
    correctors and pass their figure.
    ``seconds_per_line`` and ``chars_per_second``: the reading rate (defaults
    those of ``ocrbench review``). ``price_hour``: what an hour of a person's
    review or correction costs (None: not priced). ``correctors`` (None: not
    given; the plan then says how many the deadline needs) each working
    ``hours_per_week``.
    """

    seconds_per_error: float = DEFAULT_SECONDS_PER_ERROR
    price_hour: float | None = None
    review: str = "full"
    seconds_per_line: float = _RATE.seconds_per_line
    chars_per_second: float = _RATE.chars_per_second
    review_share: float = DEFAULT_REVIEW_SHARE
    catch_rate: float | None = None
    correctors: int | None = None
    hours_per_week: float = DEFAULT_HOURS_PER_WEEK
    catch_rate_source: str = "given"

    def __post_init__(self) -> None:
        if self.review not in REVIEW_MODES:
            raise PlanError(f"review mode must be one of {', '.join(REVIEW_MODES)}, not {self.review!r}")
        if self.review == "targeted" and self.catch_rate is None:
            raise PlanError("targeted review needs the share of errors the queue's head catches (--catch-rate; "
                            "measure it with `ocrbench review --truth`, 'share of error lines caught', or give "
                            "--truth to the plan)")
        for name in ("seconds_per_error", "seconds_per_line", "hours_per_week"):
            if getattr(self, name) < 0:
                raise PlanError(f"{name} cannot be negative")
        if self.chars_per_second <= 0 or self.hours_per_week <= 0:
            raise PlanError("chars_per_second and hours_per_week must be positive")
        for name in ("review_share", "catch_rate"):
            v = getattr(self, name)
            if v is not None and not 0.0 <= v <= 1.0:
                raise PlanError(f"{name} must be within 0..1, not {v}")
        if self.correctors is not None and self.correctors < 1:
            raise PlanError("correctors must be at least 1")

    def describe(self) -> str:
        read = (f"reading {self.seconds_per_line:g} s per line + 1 s per {self.chars_per_second:g} characters "
                f"(the rate `ocrbench review` uses; {'default, assumed' if self._default_rate() else 'given'})")
        fix = (f"{self.seconds_per_error:g} s per character error corrected ("
               + ("default: keystroke-level edit of 3-4 s plus finding the error on the scan; common practice)"
                  if self.seconds_per_error == DEFAULT_SECONDS_PER_ERROR else "given)"))
        if self.review == "none":
            return "review mode none: nobody reads the text; every error stays in it"
        if self.review == "full":
            return f"review mode full: every line read, {read}; every error found and corrected, {fix}"
        return (f"review mode targeted: the {100 * self.review_share:g}% most doubtful lines read, {read}; they "
                f"hold {100 * self.catch_rate:.0f}% of the errors ({self.catch_rate_source}), corrected at {fix}; "
                "the rest stay")

    def _default_rate(self) -> bool:
        return (self.seconds_per_line, self.chars_per_second) == (_RATE.seconds_per_line, _RATE.chars_per_second)


def effort(c: Correction, lines: float, chars: float, errors: tuple[float, float, float] | None) -> dict:
    """Hours of reading and of correcting, and errors left, for an archive of ``lines`` and ``chars``.

    ``errors``: expected character errors (middle, low, high), None when no CER is known.
    ``people_hours``: reading + correcting (None when correcting cannot be known).
    """
    read_s = lines * c.seconds_per_line + chars / c.chars_per_second
    share = {"full": 1.0, "targeted": c.review_share, "none": 0.0}[c.review]
    caught = {"full": 1.0, "targeted": c.catch_rate or 0.0, "none": 0.0}[c.review]
    out = {"review_mode": c.review, "review_hours": share * read_s / 3600, "catch_rate": caught,
           "seconds_per_error": c.seconds_per_error, "seconds_per_line": c.seconds_per_line,
           "chars_per_second": c.chars_per_second}
    sfx = ("", "_low", "_high")
    if errors is None and c.review != "none":
        out |= {f"correction_hours{s}": None for s in sfx} | {f"people_hours{s}": None for s in sfx}
        out |= {f"errors_left{s}": None for s in sfx}
        return out
    errs = errors or (0.0, 0.0, 0.0)
    for s, e in zip(sfx, errs):
        fix = e * caught * c.seconds_per_error / 3600 if errors is not None else 0.0
        out[f"correction_hours{s}"] = fix
        out[f"people_hours{s}"] = out["review_hours"] + fix
        out[f"errors_left{s}"] = None if errors is None else e * (1.0 - caught)
    return out


def schedule(c: Correction, people_hours_high: float | None, deadline_s: float | None) -> dict:
    """Whether the correctors finish within the deadline, and how many it needs (upper hours)."""
    out = {"correctors": c.correctors, "corrector_hours_per_week": c.hours_per_week, "correctors_needed": None,
           "people_seconds_high": None, "correction_meets_deadline": None}
    if c.review == "none" or people_hours_high == 0:
        out |= {"correctors_needed": 0, "people_seconds_high": 0.0, "correction_meets_deadline": True}
        return out
    if people_hours_high is None:
        return out
    if c.correctors:
        out["people_seconds_high"] = people_hours_high / (c.correctors * c.hours_per_week) * WEEK
    if deadline_s is not None:
        weeks = deadline_s / WEEK
        out["correctors_needed"] = int(math.ceil(people_hours_high / (c.hours_per_week * weeks) - 1e-9))
        if c.correctors:
            out["correction_meets_deadline"] = bool(out["people_seconds_high"] <= deadline_s)
    return out


def both(a: bool | None, b: bool | None) -> bool | None:
    """Logical and with unknowns: False if either is False, None if either is unknown, else True."""
    if a is False or b is False:
        return False
    if a is None or b is None:
        return None
    return True


def money(compute: tuple[float | None, float | None], people: dict, price_hour: float | None) -> dict:
    """Compute and people costs (middle and high), their total and shares; unpriced and unknown items named.

    ``compute``: compute cost at P50 and P90 (None: not priced). A total is given only when every
    part is priced and known; otherwise ``cost`` is None and ``unpriced`` / ``unknown`` say why.
    """
    unpriced, unknown = [], []
    if compute[0] is None:
        unpriced.append("compute (no --price-core-hour or --price-machine-hour)")
    hours, hours_hi = people.get("people_hours"), people.get("people_hours_high")
    needs_people = people["review_mode"] != "none" and (hours is None or hours > 0)
    if hours is None and needs_people:
        unknown.append("correction hours (no CER: give --truth or an [accuracy] table)")
    if needs_people and price_hour is None:
        unpriced.append("review and correction (no --price-correction-hour)")
    pc = (None if hours is None or price_hour is None else hours * price_hour,
          None if hours_hi is None or price_hour is None else hours_hi * price_hour)
    if not needs_people:
        pc = (0.0, 0.0)
    out = {"people_cost": pc[0], "people_cost_high": pc[1], "unpriced": unpriced, "unknown": unknown,
           "correction_cost": None, "correction_cost_high": None}
    if price_hour is not None and people.get("correction_hours") is not None:
        out["correction_cost"] = people["correction_hours"] * price_hour
        out["correction_cost_high"] = people["correction_hours_high"] * price_hour
        out["review_cost"] = people["review_hours"] * price_hour
    whole = not unpriced and not unknown
    out["cost"] = compute[0] + pc[0] if whole else None
    out["cost_high"] = compute[1] + pc[1] if whole else None
    priced = [v for v in (compute[0], pc[0]) if v is not None]
    out["cost_priced_part"] = sum(priced) if priced else None
    out["cost_priced_part_high"] = sum(v for v in (compute[1], pc[1]) if v is not None) if priced else None
    total = out["cost"]
    out["compute_share"] = None if not total else compute[0] / total
    out["people_share"] = None if not total else pc[0] / total
    return out


def budget_fit(m: dict, budget: float | None) -> bool | None:
    """``cost_high`` within the budget; no when the priced part alone exceeds it; unknown when a part is unpriced."""
    if budget is None:
        return None
    if m["cost_high"] is not None:
        return bool(m["cost_high"] <= budget)
    if m["cost_priced_part_high"] is not None and m["cost_priced_part_high"] > budget:
        return False
    return None
