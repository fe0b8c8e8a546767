"""What every command module shares: exit codes and the one-line failure."""

from __future__ import annotations

import typer

EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE = 0, 1, 2
EXIT_INTERRUPTED = 130


def fail(message: str, code: int = EXIT_USAGE) -> "typer.Exit":
    """Print one clear line to stderr and return the Exit to raise."""
    typer.echo(f"ocrbench: {message}", err=True)
    return typer.Exit(code)
