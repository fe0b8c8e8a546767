"""What every command module shares: exit codes, the one-line failure, choice enumerations.

Choices are enumerations so that ``--help`` lists them and typer refuses any
other value with a usage error (exit 2) naming the valid ones.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Iterable

import typer

from ocrbench.accuracy.normalise import PROFILES

EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE = 0, 1, 2
EXIT_INTERRUPTED = 130


def fail(message: str, code: int = EXIT_USAGE) -> "typer.Exit":
    """Print one clear line to stderr and return the Exit to raise."""
    typer.echo(f"ocrbench: {message}", err=True)
    return typer.Exit(code)


def choices(name: str, values: Iterable[str]) -> type[StrEnum]:
    """A str-valued enumeration of ``values`` (member name = value), for a typer option."""
    return StrEnum(name, {v: v for v in values})  # type: ignore[return-value]


#: Normalisation profiles (``ocrbench.accuracy.normalise``).
ProfileName = choices("ProfileName", PROFILES)
#: Table formats written by ``export``.
TableFormat = choices("TableFormat", ("parquet", "csv"))
