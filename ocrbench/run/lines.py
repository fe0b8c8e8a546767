"""Line crops of a folder of pages, for work that needs real lines but no run (variant calibration)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ocrbench.errors import InputError
from ocrbench.pages import analyse_page, list_pages, load_page


def page_line_crops(target: Path | str, *, limit: int = 256) -> tuple[list[np.ndarray], list[str]]:
    """Up to ``limit`` grey line crops from the pages of ``target`` (a folder or one image), in page order.

    Returns (crops, problems): a page that cannot be read is skipped and named
    in ``problems`` (one line each), the others go on.
    """
    crops: list[np.ndarray] = []
    problems: list[str] = []
    for ref in list_pages(target):
        if len(crops) >= limit:
            break
        try:
            layout = analyse_page(load_page(ref).gray)
        except InputError as e:
            problems.append(str(e))
            continue
        except ValueError as e:  # an image the line finder cannot work with
            problems.append(f"{ref.display()}: {e}")
            continue
        crops.extend(lb.crop for lb in layout.lines[: limit - len(crops)])
    return crops, problems
