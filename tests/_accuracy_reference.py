"""Slow textbook references for the accuracy tests (kept out of the package on purpose).

``wagner_fischer``: the dynamic-programming edit distance of R. A. Wagner and
M. J. Fischer, "The string-to-string correction problem", J. ACM 21(1), 1974:
D[i][j] = min(D[i-1][j] + 1, D[i][j-1] + 1, D[i-1][j-1] + [a_i != b_j]), unit costs.
"""

from __future__ import annotations

from typing import Sequence


def wagner_fischer(a: Sequence, b: Sequence) -> int:
    """Levenshtein distance with unit costs, full (len a + 1) x (len b + 1) table."""
    prev = list(range(len(b) + 1))
    for i in range(1, len(a) + 1):
        cur = [i] + [0] * len(b)
        for j in range(1, len(b) + 1):
            cur[j] = min(prev[j] + 1,                         # deletion of a[i-1]
                         cur[j - 1] + 1,                      # insertion of b[j-1]
                         prev[j - 1] + (a[i - 1] != b[j - 1]))  # substitution or match
        prev = cur
    return prev[len(b)]
