"""Accuracy of recognised text against ground truth (pure: no model runtime, no CLI).

Modules: :mod:`normalise` (named profiles), :mod:`align` (Levenshtein distance,
edit scripts, character classes), :mod:`amounts` (ledger amounts),
:mod:`score` (CER/WER tables and summary), :mod:`stats` (page bootstrap, paired
comparison, ground-truth sample size), :mod:`recipe` (what produced a figure),
:mod:`textio` (reading text files and pairing folders; the only file I/O here).
"""

from ocrbench.accuracy.normalise import PROFILES, apply, get_profile
from ocrbench.accuracy.score import Scores, score_pages
from ocrbench.accuracy.stats import (bootstrap_ratio_ci, cochran_n0, paired_comparison,
                                     sample_size_for_cer)

__all__ = ["PROFILES", "apply", "get_profile", "Scores", "score_pages", "bootstrap_ratio_ci",
           "cochran_n0", "paired_comparison", "sample_size_for_cer"]
