"""Accuracy of recognised text against ground truth (pure: no model runtime, no CLI).

Modules: :mod:`normalise` (named profiles), :mod:`align` (Levenshtein distance,
edit scripts, character classes), :mod:`score` (CER/WER tables and summary),
:mod:`stats` (every interval: page bootstrap, Wilson, paired comparison,
ground-truth sample size), :mod:`recipe` (what produced a figure),
:mod:`evaluate` (run store or hypothesis folder + truth folder -> scores; the
only module here that reads files, through :mod:`ocrbench.io.text` and the store).
"""

from ocrbench.accuracy.normalise import PROFILES, apply, get_profile
from ocrbench.accuracy.score import Scores, score_pages
from ocrbench.accuracy.stats import (bootstrap_ratio_ci, cochran_n0, paired_comparison,
                                     sample_size_for_cer)

__all__ = ["PROFILES", "apply", "get_profile", "Scores", "score_pages", "bootstrap_ratio_ci",
           "cochran_n0", "paired_comparison", "sample_size_for_cer"]
