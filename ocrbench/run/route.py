"""Routing by doubt: a fast recogniser reads every line, a slow one re-reads the lines the fast one doubts.

Why: the slow model's cost is then paid on a share of the lines only. Where the
slow model is the more accurate one, this buys most of its accuracy for a
fraction of its cost; the share routed, and so the cost, is set by one
threshold on the review queue's doubt score (``ocrbench.postprocess.review``:
low confidence, failed page arithmetic, unlisted words).

Route syntax (``ocrbench run ... --route``)::

    FAST -> SLOW if doubt > X

FAST and SLOW name two of the run's recognisers (card name, or the card's
folder or file as given to ``--recogniser``); X is a number (the doubt scale
of the review queue: 0 for a certain line, 1 for confidence 0, more with
failed arithmetic). ``when`` may stand for ``if``; spaces around ``->`` and
``>`` are optional. A line is routed when its doubt is strictly above X.

Cost of a route (the planner's arithmetic, measured figures in)::

    cost = fast seconds on every line + slow seconds on the routed lines

and, from a measurement of the slow model on every line, the expected cost at a
routed share s is ``fast_all + s * slow_all`` (:func:`expected_cost`).
"""

from __future__ import annotations

import hashlib
import math
import re
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ocrbench.errors import ConfigError
from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.postprocess.review import DoubtWeights, review_queue

_TAIL = re.compile(r"^\s*(?P<slow>.*?\S)\s+(?:if|when)\s+doubt\s*>\s*(?P<x>[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*$",
                   re.IGNORECASE)
SYNTAX = "FAST -> SLOW if doubt > X"


@dataclass(frozen=True)
class Route:
    """A parsed route: recogniser names (or card paths) and the doubt threshold."""

    fast: str
    slow: str
    threshold: float

    def __str__(self) -> str:
        return f"{self.fast} -> {self.slow} if doubt > {self.threshold:g}"

    def identity(self, fast_hash: str, slow_hash: str) -> str:
        """The route's hash: both card hashes and the threshold (what a rerun must match to resume)."""
        return hashlib.sha256(f"route\n{fast_hash}\n{slow_hash}\n{self.threshold!r}".encode()).hexdigest()


def parse_route(text: str) -> Route:
    """``"ledger-ctc -> ledger-seq if doubt > 0.3"`` -> Route. ConfigError naming the syntax otherwise."""
    parts = (text or "").split("->")
    m = _TAIL.match(parts[1]) if len(parts) == 2 and parts[0].strip() else None
    if not m:
        raise ConfigError("--route", f"cannot read {text!r}; write it as '{SYNTAX}', "
                                     "e.g. 'ledger-ctc -> ledger-seq if doubt > 0.3'")
    x = float(m["x"])
    fast, slow = parts[0].strip(), m["slow"].strip()
    if fast == slow:
        raise ConfigError("--route", f"FAST and SLOW are both {fast!r}; a route needs two recognisers")
    return Route(fast, slow, x)


def line_doubts(texts: Sequence[str], confidences: Sequence[float | None], *, lexicon: Lexicon | None = None,
                weights: DoubtWeights = DoubtWeights(), decimal_mark: str = ".") -> np.ndarray:
    """The review queue's doubt of each line of one page, in line order (the page's arithmetic included)."""
    if not texts:
        return np.zeros(0)
    rows = [{"page_id": "page", "line_no": i, "text": t, "confidence": c}
            for i, (t, c) in enumerate(zip(texts, confidences))]
    q = review_queue(rows, lexicon=lexicon, weights=weights, decimal_mark=decimal_mark).table
    return q.sort_values("line_no")["doubt"].to_numpy(dtype=float)


def routed_lines(doubts: Sequence[float] | np.ndarray, threshold: float) -> list[int]:
    """Indices of the lines whose doubt is strictly above the threshold, in line order."""
    return [int(i) for i in np.flatnonzero(np.asarray(doubts, dtype=float) > threshold)]


@dataclass(frozen=True)
class Merged:
    """The kept reading of each line of a routed page."""

    texts: list[str]
    confidences: list[float]
    kept: list[str]                  # "fast" or "slow", per line


def merge_readings(fast_texts: Sequence[str], fast_conf: Sequence[float], routed: Sequence[int],
                   slow_texts: Sequence[str], slow_conf: Sequence[float]) -> Merged:
    """Fast readings everywhere but on the routed lines, where the slow reading is kept.

    ``slow_texts``/``slow_conf`` are in the order of ``routed``. The fast
    readings themselves are never changed (the store keeps both).
    """
    if len(slow_texts) != len(routed) or len(slow_conf) != len(routed):
        raise ValueError(f"{len(routed)} routed lines but {len(slow_texts)} slow readings")
    texts, conf, kept = list(fast_texts), [float(c) for c in fast_conf], ["fast"] * len(fast_texts)
    for i, t, c in zip(routed, slow_texts, slow_conf):
        texts[i], conf[i], kept[i] = t, float(c), "slow"
    return Merged(texts, conf, kept)


@dataclass(frozen=True)
class RouteCost:
    """Measured cost of a routed run: seconds of each recogniser and the share of lines routed."""

    lines: int
    routed: int
    fast_seconds: float              # fast recogniser on every line
    slow_seconds: float              # slow recogniser on the routed lines

    @property
    def share(self) -> float:
        return self.routed / self.lines if self.lines else 0.0

    @property
    def seconds(self) -> float:
        return self.fast_seconds + self.slow_seconds

    def vs_slow_alone(self, slow_all_seconds: float) -> float:
        """The route's cost as a share of the slow recogniser reading every line."""
        return self.seconds / slow_all_seconds


def expected_cost(fast_all: float, slow_all: float, share: float) -> float:
    """Cost of a route predicted from the two recognisers' costs on every line: ``fast_all + share * slow_all``."""
    if not 0.0 <= share <= 1.0:
        raise ValueError(f"the routed share must be within 0..1, not {share}")
    return fast_all + share * slow_all


def threshold_for_share(doubts: Sequence[float] | np.ndarray, share: float) -> float:
    """The smallest threshold routing at most ``share`` of these lines (a planner's starting point)."""
    d = np.sort(np.asarray(doubts, dtype=float))[::-1]
    k = int(math.floor(share * d.size + 1e-9))
    if d.size == 0 or k >= d.size:
        return -math.inf
    return float(d[k])
