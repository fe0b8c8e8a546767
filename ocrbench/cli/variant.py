"""``ocrbench variant quantise CARD --out DIR``: an int8-quantised copy of a recogniser, with its own card.

Dynamic quantisation by default (weights to int8, activations quantised as the
model runs); ``--calibration DIR`` (a folder of page images) makes it static:
activations are calibrated on that folder's lines (CTC cards only). The new
card records the provenance (source card hash, method, operators,
onnxruntime version); measure the copy against its source with ``ocrbench run``
and ``ocrbench score`` before trusting it (DEVELOPERS.md, "Variants").
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError

ACTIONS = ("quantise",)


def variant(
    action: str = typer.Argument(..., help="What to make: quantise."),
    card: Path = typer.Argument(..., help="The source recogniser card (card.toml or its folder)."),
    out: Path = typer.Option(..., "--out", help="Folder for the variant's files and card (created)."),
    ops: str = typer.Option("lstm,matmul", "--ops",
                            help="Operators to quantise: a comma-separated list of lstm, gru, matmul, gemm, conv, "
                                 "attention, or all. Integer convolutions can be slower on CPU: measure."),
    calibration: Optional[Path] = typer.Option(None, "--calibration",
                                               help="Folder of page images: static quantisation calibrated on "
                                                    "their lines (CTC cards only); without it, dynamic."),
    calibration_lines: int = typer.Option(256, "--calibration-lines", min=1,
                                          help="With --calibration: lines used at most."),
    per_channel: bool = typer.Option(False, "--per-channel", help="One weight scale per output channel."),
    name: Optional[str] = typer.Option(None, "--name", help="The variant's name (default: the source's + -int8...)."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Make a variant of a recogniser (an int8-quantised copy) with its own card recording where it came from."""
    from ocrbench.recognisers.variant import parse_ops, quantise_card
    from ocrbench.run.lines import page_line_crops

    if action not in ACTIONS:
        raise fail(f"unknown variant action {action!r}; use one of {', '.join(ACTIONS)}", EXIT_USAGE)
    err = Console(stderr=True)
    try:
        op_set = parse_ops(ops)
        crops = None
        if calibration is not None:
            crops, problems = page_line_crops(calibration, limit=calibration_lines)
            for p in problems:
                err.print(f"ocrbench: {p}; left out of the calibration", markup=False, highlight=False, soft_wrap=True)
        res = quantise_card(card, out, ops=op_set, calibration=crops, name=name, per_channel=per_channel)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    d = res.to_dict()
    if as_json:
        typer.echo(json.dumps(d, ensure_ascii=False))
        raise typer.Exit(EXIT_OK)
    con = Console()
    size = ", ".join(f"{r} {d['bytes_before'][r] / 1e6:.1f} -> {d['bytes_after'][r] / 1e6:.1f} MB"
                     for r in d["bytes_before"])
    con.print(f"{d['name']}: {res.method} int8 of {', '.join(res.operators)} ({size}); card {d['card']}",
              markup=False, highlight=False, soft_wrap=True)
    con.print(f"measure it against {res.source.name}: ocrbench run PAGES -r {res.source.folder} -r {out} "
              "--store S.sqlite, then ocrbench score", markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(EXIT_OK)
