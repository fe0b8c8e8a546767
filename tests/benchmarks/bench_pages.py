"""Page analysis speed, measured side by side with reference work on the same pages.

Run: ``python tests/benchmarks/bench_pages.py [N_PAGES]``. Prints the median milliseconds per
page of each stage (load, skew, deskew + segment) and two ratios measured in the same run:
analysis / decoding the image, and analysis / a scikit-image baseline of the same kind of
work (Sauvola threshold + 8-connected labelling). The target is that analysing a
1100 x 1500 page costs a small multiple of decoding it and stays well under a second.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from ocrbench.pages import analyse_page, estimate_skew, list_pages, load_page  # noqa: E402


def main(n_pages: int = 8, repeats: int = 3, clock=time.perf_counter) -> None:
    from skimage.filters import threshold_sauvola
    from skimage.measure import label

    refs = list_pages(ROOT / "scans_demo")[:n_pages]
    t_load, t_skew, t_analyse, t_ref = [], [], [], []
    for ref in refs:
        for _ in range(repeats):
            t0 = clock()
            page = load_page(ref)
            t1 = clock()
            estimate_skew(page.gray)
            t2 = clock()
            analyse_page(page.gray)
            t3 = clock()
            label(page.gray <= threshold_sauvola(page.gray, window_size=25), connectivity=2)
            t4 = clock()
            t_load.append(t1 - t0)
            t_skew.append(t2 - t1)
            t_analyse.append(t3 - t2)
            t_ref.append(t4 - t3)
    shape = page.gray.shape
    med = {k: statistics.median(v) * 1000 for k, v in
           (("load", t_load), ("skew", t_skew), ("analyse", t_analyse), ("skimage", t_ref))}
    print(f"{len(refs)} demo pages x {repeats}, last page {shape[1]}x{shape[0]} px")
    for k, v in med.items():
        print(f"  {k:8s} {v:8.1f} ms/page (median)")
    print(f"  ratio analyse/load    {med['analyse'] / med['load']:.2f}")
    print(f"  ratio analyse/skimage {med['analyse'] / med['skimage']:.2f}")
    px = np.prod(shape)
    print(f"  analyse at 1100x1500 scaled: {med['analyse'] * 1100 * 1500 / px:.0f} ms")
    print(f"RATIO page_analyse_vs_load {med['analyse'] / med['load']:.3f} info")      # for run_all.py
    print(f"RATIO page_analyse_vs_skimage {med['analyse'] / med['skimage']:.3f} info")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 8)
