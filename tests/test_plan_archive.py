"""One archive description: characters per line of a segmented sample, estimated once, from the right width.

The calibration pages come from ocrbench.synth (ledger layout, serif type, their own .txt ground truth);
the held-out pages from a renderer of this test's own (sans type, an amount column far to the right, as
tests/benchmarks/bench_plan_whole.py draws them), whose true characters per line are counted from the
strings drawn. External reference: the strings' own lengths (what was drawn is what is counted).
"""

from __future__ import annotations

import random
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from ocrbench import synth  # noqa: E402
from ocrbench.planning.archive import with_shared_characters  # noqa: E402
from ocrbench.planning.costmodel import fit_cost_model, fit_width  # noqa: E402
from ocrbench.planning.inputs import describe_sample  # noqa: E402

from test_planner import calibrate  # noqa: E402

WORDS = ("Paid", "Received", "To", "By", "Cash", "Coals", "Rent", "Wages", "Carriage", "Sundries")
HEIGHT = 32      # the recognisers' line height


def _held_out(out: Path, n: int, seed: int) -> list[int]:
    """n pages in sans type with the amount far right; returns each line's true characters."""
    from PIL import Image, ImageDraw, ImageFont

    font = ImageFont.truetype(str(synth.FONT_DIR / "DejaVuSans.ttf"), 30)
    rnd, truth = random.Random(seed), []
    out.mkdir(parents=True)
    for i in range(n):
        img = Image.new("L", (1500, 1200), 250)
        d = ImageDraw.Draw(img)
        y = 80
        for _ in range(rnd.randint(14, 18)):
            left = f"{rnd.randint(1, 28)} " + " ".join(rnd.choice(WORDS) for _ in range(rnd.randint(2, 6)))
            amount = f"{rnd.randint(1, 999)}.{rnd.randint(0, 99):02d}"
            d.text((rnd.randint(80, 140), y), left, fill=20, font=font)
            d.text((1200, y), amount, fill=20, font=font)
            truth.append(len(left) + 1 + len(amount))
            y += rnd.randint(52, 58)
        img.save(out / f"h{i}.png")
    return truth


def _calibration_fits(tmp: Path) -> tuple[object, object]:
    """Two recognisers' width-to-characters fits on the same synth pages: one reading whole lines, one cutting
    lines at blank gaps wider than a line height (its widths are the ink only, as the runner records them)."""
    for i in range(4):
        synth.write_page(tmp / "cal", f"c{i}", synth.PageSpec(seed=i, lines_per_page=14), "png")
    arch, failed = describe_sample(tmp / "cal", sample_pages=4, split_gaps=[1.0])
    assert not failed
    sl = arch.sample_lines
    chars = []
    for pid, g in sl.groupby("page_id", sort=False):
        truth = (tmp / "cal" / f"{Path(pid).stem}.txt").read_text(encoding="utf-8").splitlines()
        assert len(truth) == len(g), "the synth page's lines are segmented one for one"
        chars += [len(t) for t in truth]
    chars = np.asarray(chars, dtype=float)
    whole = _whole(sl)
    ink = np.array([sum(np.round(np.asarray(p) * HEIGHT / h)) for p, h in zip(sl["pieces_1"], sl["crop_h"])])
    base = fit_cost_model(calibrate(noise=0.0, kinds=("seq",)), "demo-seq", n_boot=5)
    reader = replace(base, recogniser="whole-reader", line_height=HEIGHT, width=fit_width(chars, whole))
    cutter = replace(base, recogniser="gap-cutter", line_height=HEIGHT, split_gap=1.0, width=fit_width(chars, ink))
    return reader, cutter


def _whole(sl) -> np.ndarray:
    return np.round(sl["crop_w"].to_numpy(float) * HEIGHT / sl["crop_h"].to_numpy(float))


def test_sample_characters_come_from_the_ink_width_on_another_typeface(tmp_path):
    reader, cutter = _calibration_fits(tmp_path)
    truth = _held_out(tmp_path / "held", 3, seed=7)
    arch, failed = describe_sample(tmp_path / "held", sample_pages=3, split_gaps=[1.0])
    assert not failed and len(arch.sample_lines) == len(truth)
    shared, note = with_shared_characters(arch, [reader, cutter])
    est = shared.sample_lines["n_chars"].to_numpy(float)
    true_mean = float(np.mean(truth))
    # one estimate for both recognisers, within 10 % of the characters drawn
    assert abs(est.mean() / true_mean - 1) <= 0.10, (est.mean(), true_mean)
    assert "gap-cutter" in note and "ink" in note and "whole-reader R^2" in note
    # what went wrong before: the gap-cutter's fit (made on ink widths) applied to the whole line's width,
    # blank gap before the amount included, reads far more characters than were drawn
    wrong = cutter.width.chars(_whole(arch.sample_lines)).mean()
    assert wrong / true_mean - 1 > 0.25, (wrong, true_mean)
    # with only the whole-line reader (ledger fields span the page, width says little) the plan says so
    _, weak = with_shared_characters(arch, [reader])
    assert "says little about characters" in weak
    # the same estimate whatever the order the recognisers come in
    again, _ = with_shared_characters(arch, [cutter, reader])
    assert list(again.sample_lines["n_chars"]) == list(shared.sample_lines["n_chars"])


def test_a_sample_with_characters_is_kept_as_it_is(tmp_path):
    reader, cutter = _calibration_fits(tmp_path)
    arch, _ = describe_sample(tmp_path / "cal", sample_pages=2, split_gaps=[1.0])
    with_chars = replace(arch, sample_lines=arch.sample_lines.assign(n_chars=10))
    same, note = with_shared_characters(with_chars, [reader, cutter])
    assert same is with_chars and note is None
    assert pytest.approx(10.0) == float(same.sample_lines["n_chars"].mean())
