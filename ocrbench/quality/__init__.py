"""Quality while a run goes on: estimated error without ground truth, drift, and what to key next.

Modules: :mod:`.isotonic` (pool-adjacent-violators), :mod:`.data` (read-only
store snapshot, collections, doubt and arithmetic per line and page),
:mod:`.estimate` (calibration of doubt against keyed pages, estimated CER with
intervals), :mod:`.drift` (Kolmogorov–Smirnov with page permutation, Holm),
:mod:`.summary` (the ``quality`` figures per group), :mod:`.sample`
(stratified choice of pages to key, keying templates).
"""
