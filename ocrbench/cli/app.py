"""Command layer: parses, calls the library, prints. Nothing else lives here.

Exit codes: 0 all good, 1 some inputs failed (they are listed), 2 usage error
or an error that stops the whole command (bad card, unusable store).
Each command lives in ``ocrbench/cli/<name>.py`` and defines one function; this
module registers them explicitly (``COMMANDS`` below), so nothing under ``cli/``
imports this module's siblings at import time and the registration order is visible.
"""

from __future__ import annotations

import functools
import os
from typing import Callable

import click
import typer
import typer.exceptions

from ocrbench import __version__
from ocrbench.errors import OcrbenchError

from ocrbench.cli.common import EXIT_INTERRUPTED, EXIT_OK, EXIT_USAGE

#: Set to 1 to let an unexpected error show its traceback (for a bug report).
DEBUG_ENV = "OCRBENCH_DEBUG"

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


def _debug() -> bool:
    return os.environ.get(DEBUG_ENV, "").strip() not in ("", "0")


def _say(message: str) -> None:
    """One line on stderr, whatever the exception's text holds (line breaks folded)."""
    typer.echo("ocrbench: " + " ".join(message.split()), err=True)


def unexpected(e: BaseException) -> str:
    """The one line shown for an error ocrbench did not expect: what it was, and how to report it."""
    return (f"unexpected error: {type(e).__name__}: {e}. This is a fault in ocrbench, not in your input: "
            f"please report it with the command you ran (rerun with {DEBUG_ENV}=1 to see the traceback)")


# typer's own exits and usage errors (typer carries its own copy of click; plain click's are listed too).
_PASS_THROUGH = (typer.exceptions.Exit, typer.exceptions.Abort, typer.exceptions.TyperException,
                 click.exceptions.Exit, click.exceptions.Abort, click.exceptions.ClickException)


def guarded(fn: Callable) -> Callable:
    """``fn`` with the command-line error contract: no traceback reaches a user.

    Ctrl-C -> one line, exit 130; an OcrbenchError that escaped the command ->
    its one line, exit 2; anything else -> one line naming it with a hint to
    report it, exit 2 (the traceback only with ``OCRBENCH_DEBUG=1``). Exits
    and usage errors of typer/click pass through unchanged.
    """
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except _PASS_THROUGH:
            raise
        except KeyboardInterrupt:
            _say("interrupted")
            raise typer.Exit(EXIT_INTERRUPTED) from None
        except OcrbenchError as e:
            _say(str(e))
            raise typer.Exit(EXIT_USAGE) from None
        except Exception as e:  # noqa: BLE001 - the last line of defence, by design
            if _debug():
                raise
            _say(unexpected(e))
            raise typer.Exit(EXIT_USAGE) from None
    return wrapper


# Explicit registration: (command name, module, function). Each module under cli/
# only parses, calls the library and prints; none of them imports this one.
from ocrbench.cli import (balance, card, demo, export, measure, pages, plan, postprocess,  # noqa: E402
                          quality, report, review, run, sample, score, tune, variant)

COMMANDS = [
    ("pages", pages.pages_command),
    ("run", run.run),
    ("score", score.score_cmd),
    ("review", review.review),
    ("quality", quality.quality_cmd),
    ("sample", sample.sample_cmd),
    ("balance", balance.balance),
    ("plan", plan.plan),
    ("report", report.report),
    ("measure-scaling", measure.measure_scaling_cmd),
    ("tune", tune.tune_cmd),
    ("postprocess", postprocess.postprocess),
    ("export", export.export_cmd),
    ("demo", demo.demo),
    ("variant", variant.variant),
    ("card", card.card_cmd),
]
for _name, _fn in COMMANDS:
    app.command(_name)(guarded(_fn))


def main() -> None:
    """The entry point: the commands, with the same contract for what happens outside them."""
    try:
        app()
    except KeyboardInterrupt:
        _say("interrupted")
        raise SystemExit(EXIT_INTERRUPTED) from None
    except OcrbenchError as e:  # an error that stops the whole command
        _say(str(e))
        raise SystemExit(EXIT_USAGE) from None
    except Exception as e:  # noqa: BLE001 - the last line of defence, by design
        if _debug():
            raise
        _say(unexpected(e))
        raise SystemExit(EXIT_USAGE) from None
