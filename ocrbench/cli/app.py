"""Command layer: parses, calls the library, prints. Nothing else lives here.

Exit codes: 0 all good, 1 some inputs failed (they are listed), 2 usage error
or an error that stops the whole command (bad card, unusable store).
Each command lives in ``ocrbench/cli/<name>.py`` and defines one function; this
module registers them explicitly (``COMMANDS`` below), so nothing under ``cli/``
imports this module's siblings at import time and the registration order is visible.
"""

from __future__ import annotations

import sys

import typer

from ocrbench import __version__
from ocrbench.errors import OcrbenchError

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE

app = typer.Typer(
    name="ocrbench",
    help="Measure, compare, plan and run OCR of a scanned archive on CPU: "
    "autoregressive (encoder-decoder) vs parallel (CTC) recognisers.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"ocrbench {__version__}")
        raise typer.Exit(EXIT_OK)


@app.callback()
def _root(version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                       help="Print the version and exit.")) -> None:
    """ocrbench: choose between autoregressive and CTC OCR for a whole archive, then run it."""





# Explicit registration: (command name, module, function). Each module under cli/
# only parses, calls the library and prints; none of them imports this one.
from ocrbench.cli import (balance, card, demo, export, pages, plan, postprocess,  # noqa: E402
                          report, review, run, score)

COMMANDS = [
    ("pages", pages.pages_command),
    ("run", run.run),
    ("score", score.score_cmd),
    ("review", review.review),
    ("balance", balance.balance),
    ("plan", plan.plan),
    ("report", report.report),
    ("measure-scaling", plan.measure_scaling_cmd),
    ("postprocess", postprocess.postprocess),
    ("export", export.export_cmd),
    ("demo", demo.demo),
    ("card", card.card_cmd),
]
for _name, _fn in COMMANDS:
    app.command(_name)(_fn)


def main() -> None:
    try:
        app()
    except OcrbenchError as e:  # an error that stops the whole command
        typer.echo(f"ocrbench: {e}", err=True)
        sys.exit(EXIT_USAGE)
