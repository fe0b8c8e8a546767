"""The command line: ``app`` registers one function per command; ``main`` is the entry point."""

from __future__ import annotations


def main() -> None:
    from ocrbench.cli.app import main as _main

    _main()
