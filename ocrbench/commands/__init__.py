"""CLI commands, one module each. ``register_all`` imports them so they attach to the app."""

from __future__ import annotations

import importlib
import pkgutil


def register_all() -> None:
    for mod in sorted(m.name for m in pkgutil.iter_modules(__path__)):
        importlib.import_module(f"{__name__}.{mod}")
