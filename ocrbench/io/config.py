"""Typed configuration tables: one checker for recogniser cards, plan files and
post-processing recipes.

A schema is a plain dict of :class:`Key` (a value) or nested dicts (a sub-table).
:func:`check_table` walks a parsed TOML document against it and returns the same
document with defaults filled in, or raises :class:`ConfigError` naming the file,
the dotted path of the offending key (``archive.pages``) and the problem: an
unknown key with the nearest valid name, a value of the wrong type, a number that
is not finite or out of range, a value outside its allowed set.

Why a small helper of our own rather than pydantic: the three formats need the
same four checks and a message in one fixed shape that names the file; the card's
checks also depend on the ONNX graphs (done after this pass, in ``recognisers``);
and pydantic is not among the required dependencies. Forty lines cover it.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping

from ocrbench.errors import ConfigError

_TYPE_NAMES = {bool: "true/false", int: "an integer", float: "a number", str: "a string", list: "a list",
               dict: "a table"}


@dataclass(frozen=True)
class Key:
    """One key of a table: its type(s), default, and optional checks.

    ``types``: accepted Python types (an int is accepted where a float is).
    ``required``: no default. ``choices``: allowed values. ``low``/``high``: inclusive
    bounds for numbers (``low_open``: the low bound itself is not allowed).
    ``items``: the type of each list element. ``check``: a function returning an
    error text or None. ``free``: a table whose keys are the user's (no unknown-key
    check), e.g. ``[profiles]`` named by the user.
    """

    types: tuple[type, ...]
    default: Any = None
    required: bool = False
    choices: tuple[Any, ...] | None = None
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    items: tuple[type, ...] | None = None
    check: Callable[[Any], str | None] | None = None
    free: bool = False


Schema = Mapping[str, "Key | Schema"]


def nearest(name: str, candidates: list[str]) -> str | None:
    close = difflib.get_close_matches(name, sorted(candidates), n=1, cutoff=0.6)
    return close[0] if close else None


def _type_ok(value: Any, types: tuple[type, ...]) -> bool:
    if isinstance(value, bool):
        return bool in types
    if isinstance(value, int) and float in types:
        return True
    return isinstance(value, types)


def _check_value(path: str, value: Any, key: Key) -> str | None:
    if not _type_ok(value, key.types):
        want = " or ".join(_TYPE_NAMES.get(t, t.__name__) for t in key.types)
        return f"{path} must be {want}, not {type(value).__name__} {value!r}"[:300]
    if isinstance(value, float) and not math.isfinite(value):
        return f"{path} must be a finite number, not {value!r}"
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        if key.low is not None and (value < key.low or (key.low_open and value == key.low)):
            return f"{path} must be {'>' if key.low_open else '>='} {key.low:g}, not {value!r}"
        if key.high is not None and value > key.high:
            return f"{path} must be <= {key.high:g}, not {value!r}"
    if key.choices is not None and value not in key.choices:
        hint = nearest(str(value), [str(c) for c in key.choices])
        extra = f" (did you mean {hint!r}?)" if hint else ""
        return f"{path} must be one of {', '.join(map(str, key.choices))}, not {value!r}{extra}"
    if key.items is not None and isinstance(value, list):
        for i, item in enumerate(value):
            problem = _check_value(f"{path}[{i}]", item, Key(types=key.items))
            if problem:
                return problem
    if key.check is not None:
        return key.check(value)
    return None


def check_table(doc: Mapping[str, Any], schema: Schema, *, source: Path | str, prefix: str = "") -> dict[str, Any]:
    """``doc`` checked against ``schema``, defaults filled in. Raises ConfigError."""
    out: dict[str, Any] = {}
    for k in doc:
        if k not in schema:
            path = f"{prefix}{k}"
            hint = nearest(str(k), list(schema))
            extra = f" (did you mean '{prefix}{hint}'?)" if hint else f"; valid keys here: {', '.join(schema)}"
            raise ConfigError(source, f"unknown key '{path}'{extra}")
    for k, spec in schema.items():
        path = f"{prefix}{k}"
        if isinstance(spec, Mapping):
            sub = doc.get(k, {})
            if not isinstance(sub, Mapping):
                raise ConfigError(source, f"{path} must be a table, not {type(sub).__name__}")
            out[k] = check_table(sub, spec, source=source, prefix=f"{path}.")
            continue
        if k not in doc:
            if spec.required:
                raise ConfigError(source, f"missing key '{path}'")
            out[k] = spec.default
            continue
        problem = _check_value(path, doc[k], spec)
        if problem:
            raise ConfigError(source, problem)
        out[k] = doc[k]
    return out


def read_toml(path: Path) -> dict[str, Any]:
    """A TOML file's document; unreadable or invalid files raise ConfigError naming the file."""
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as e:
        raise ConfigError(path, "file not found") from e
    except OSError as e:
        raise ConfigError(path, f"cannot read: {e.strerror or e}") from e
    except UnicodeDecodeError as e:
        raise ConfigError(path, f"not UTF-8 text (byte {e.start})") from e
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(path, f"not valid TOML: {e}") from e
