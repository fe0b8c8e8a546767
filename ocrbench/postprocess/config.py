"""A post-processing recipe from the command line's options: ``--steps``, a TOML
``[postprocess]`` table, a word list.

The table is checked with the project's one typed-table checker
(:func:`ocrbench.io.config.check_table`): its keys are ``steps``, ``word_list``
and one option table per step (``[postprocess.lexicon]``), whose keys are that
step's options. A misspelt key is refused with the nearest valid name.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

from ocrbench.errors import ConfigError
from ocrbench.io.config import Key, check_table, read_toml
from ocrbench.postprocess.lexicon import Lexicon, read_word_list
from ocrbench.postprocess.steps import STEPS, Pipeline, pipeline_from_config

#: Python types accepted for a step option, by its annotation (anything else: any TOML value).
_OPTION_TYPES = {"str": (str,), "float": (float,), "int": (int,), "bool": (bool,), "Sequence[str]": (list,),
                 "Mapping[str, str]": (dict,)}
_ANY = (bool, int, float, str, list, dict)


def _step_schema(cls) -> dict[str, Key]:
    """A step's options as config keys (its dataclass fields, less its name and the word list object)."""
    return {f.name: Key(_OPTION_TYPES.get(str(f.type), _ANY)) for f in dataclasses.fields(cls)
            if f.name not in ("name", "lexicon")}


def postprocess_schema() -> dict[str, Any]:
    """The ``[postprocess]`` table's schema: ``steps``, ``word_list``, one option table per step."""
    schema: dict[str, Any] = {"steps": Key((list,)), "word_list": Key((str,))}
    for name, cls in STEPS.items():
        schema[name] = _step_schema(cls)
    return schema


def read_postprocess_table(config: Path) -> dict[str, Any]:
    """The checked ``[postprocess]`` table of ``config`` (or the whole file when it has no such table).

    Raises ConfigError naming the file and the key's dotted path."""
    doc = read_toml(config)
    inside = "postprocess" in doc
    raw = doc["postprocess"] if inside else doc
    if not isinstance(raw, dict):
        raise ConfigError(config, f"postprocess must be a table, not {type(raw).__name__}")
    checked = check_table(raw, postprocess_schema(), source=config, prefix="postprocess." if inside else "")
    # keep only what was written: absent step tables and options stay absent (the steps' own defaults apply)
    table: dict[str, Any] = {k: v for k, v in checked.items() if k in raw and not isinstance(v, dict)}
    for k, v in checked.items():
        if isinstance(v, dict) and k in raw:
            table[k] = {o: x for o, x in v.items() if o in raw[k]}
    return table


def load_pipeline(*, steps: str | None, config: Path | None, word_list: Path | None) -> Pipeline:
    """The pipeline the options describe (``--steps`` wins over the config's list). Raises OcrbenchError."""
    table: dict[str, Any] = {}
    if config is not None:
        table = read_postprocess_table(config)
        if word_list is None and "word_list" in table:
            word_list = (config.parent / str(table["word_list"])).resolve()
    lexicon: Lexicon | None = read_word_list(word_list) if word_list is not None else None
    if steps is not None:
        table["steps"] = [s.strip() for s in steps.split(",") if s.strip()]
    if "steps" not in table:
        table["steps"] = ["unicode", "whitespace"] + (["hyphen_join", "lexicon"] if lexicon else [])
    return pipeline_from_config(table, lexicon=lexicon)
