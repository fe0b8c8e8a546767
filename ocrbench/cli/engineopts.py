"""Engine options shared by the commands that open recognisers (run, measure-scaling)."""

from __future__ import annotations

from pathlib import Path

from rich.console import Console

from ocrbench.cli.common import EXIT_USAGE, choices, fail
from ocrbench.errors import OcrbenchError
from ocrbench.recognisers.engine import DECODINGS, GRAPH_LEVELS, EngineOptions

Decoding = choices("Decoding", DECODINGS)
GraphLevel = choices("GraphLevel", GRAPH_LEVELS)


def provider_options(items: list[str]) -> tuple[tuple[str, str], ...]:
    from ocrbench.recognisers.engine import parse_provider_options

    try:
        return parse_provider_options(items)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)


def warn_before_run(cards: list[Path], engine: EngineOptions) -> None:
    """Stop on providers that cannot be had (unless allowed); warn about fallbacks and about
    generation settings beside a model that ocrbench does not apply."""
    from ocrbench.recognisers.card import load_card
    from ocrbench.recognisers.engine import resolve_providers

    err = Console(stderr=True)
    try:
        _, warnings = resolve_providers(engine.providers, engine.allow_cpu_fallback)
        for c in cards:
            warnings += [f"{c}: {w}" for w in load_card(c).warnings]
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    for w in warnings:
        err.print(f"ocrbench: warning: {w}", markup=False, highlight=False, soft_wrap=True)
