"""Measured configurations of one recogniser: its runs grouped by runner settings (batch size, threads).

A calibration store may hold a recogniser's runs at several settings (``ocrbench tune`` times each batch
size it tried into the store; ``measure-scaling`` or ``run`` at another ``--batch-size`` adds more). The
latest settings make the recogniser's row of the plan; each other group becomes an alternative
configuration the planner ranks beside it (its own cost model fitted on its own runs).

What was measured decides what may be recommended: a group whose pages took longer, page for page on
the same pages at the same threads, than another group's is *measured slower*, and the planner never
ranks it above, or recommends it over, the faster one, whatever the fitted models predict.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Mapping, Sequence

import pandas as pd

#: Settings that make a configuration of the runner (shown in the plan); other differences only separate runs.
SHOWN = ("batch_size", "intra_threads")


@dataclass
class SettingsGroup:
    """Runs of one recogniser (one card) with identical settings, and their pages' own times."""

    run_ids: list[int]
    settings: dict
    page_seconds: pd.Series          # mean t_total by page_id over the group's finished pages

    @property
    def batch_size(self) -> int | None:
        v = self.settings.get("batch_size")
        return int(v) if v is not None else None

    @property
    def threads(self) -> int | None:
        v = self.settings.get("intra_threads")
        return int(v) if v is not None else None

    def label(self) -> str:
        return ", ".join(f"{k.replace('intra_', '').replace('_', ' ')} {self.settings[k]}"
                         for k in SHOWN if self.settings.get(k) is not None) or "default settings"


def _settings(text) -> dict:
    try:
        d = json.loads(text or "{}")
    except (TypeError, ValueError):
        return {}
    return d if isinstance(d, dict) else {}


def settings_groups(frames: Mapping[str, pd.DataFrame], recogniser: str) -> list[SettingsGroup]:
    """The runs of ``recogniser`` made with its latest run's card, grouped by settings; the latest group last."""
    runs = frames["runs"]
    mine = runs[runs["recogniser"] == recogniser].sort_values("run_id")
    if mine.empty:
        return []
    mine = mine[mine["card_hash"] == mine["card_hash"].iloc[-1]]
    pages = frames["pages"]
    done = pages[(pages["status"] == "done") & pages["run_id"].isin(mine["run_id"])]
    order = list(dict.fromkeys(reversed(mine["settings_json"].tolist())))[::-1]   # by each group's latest run
    out = []
    for text in order:
        ids = [int(r) for r in mine.loc[mine["settings_json"] == text, "run_id"]]
        mine_pages = done[done["run_id"].isin(ids)]
        secs = mine_pages.groupby(mine_pages["page_id"].astype(str))["t_total"].mean() \
            if "t_total" in mine_pages else pd.Series(dtype=float)
        out.append(SettingsGroup(run_ids=ids, settings=_settings(text), page_seconds=secs.dropna()))
    return out


def measured_slower(groups: Sequence[SettingsGroup], *, min_common: int = 2) -> dict[int, str]:
    """For each group measured slower than another: index -> why (the faster group and both mean page times).

    Two groups are compared only at the same threads and on the pages both read (at least ``min_common``);
    the mean of the pages' own times decides. A group is named slower than the fastest group it lost to.
    """
    out: dict[int, str] = {}
    for i, a in enumerate(groups):
        worst = None
        for j, b in enumerate(groups):
            if i == j or a.threads != b.threads:
                continue
            common = a.page_seconds.index.intersection(b.page_seconds.index)
            if len(common) < min_common:
                continue
            ta, tb = float(a.page_seconds[common].mean()), float(b.page_seconds[common].mean())
            if ta > tb * (1 + 1e-9) and (worst is None or tb / ta < worst[0]):
                worst = (tb / ta, b, ta, tb, len(common))
        if worst is not None:
            _r, b, ta, tb, n = worst
            out[i] = (f"{a.label()} was measured slower than {b.label()}: {ta:.3g} s against {tb:.3g} s a page "
                      f"on the same {n} pages")
    return out

