"""Command layer: parses, calls the library, prints. Nothing else lives here.

Exit codes: 0 all good, 1 some inputs failed (they are listed), 2 usage error
or an error that stops the whole command (bad card, unusable store).
Each command lives in ``ocrbench/commands/<name>.py`` and registers itself on
``app``.
"""

from __future__ import annotations

import sys

import typer

from ocrbench import __version__
from ocrbench.errors import OcrbenchError

EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE = 0, 1, 2

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


def fail(message: str, code: int = EXIT_USAGE) -> "typer.Exit":
    """Print one clear line to stderr and return the Exit to raise."""
    typer.echo(f"ocrbench: {message}", err=True)
    return typer.Exit(code)


# Register the commands (each module adds itself to ``app``).
from ocrbench.commands import register_all  # noqa: E402

register_all()


def main() -> None:
    try:
        app()
    except OcrbenchError as e:  # an error that stops the whole command
        typer.echo(f"ocrbench: {e}", err=True)
        sys.exit(EXIT_USAGE)
