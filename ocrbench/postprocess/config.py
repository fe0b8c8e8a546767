"""A post-processing recipe from the command line's options: ``--steps``, a TOML
``[postprocess]`` table, a word list."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

from ocrbench.errors import InputError
from ocrbench.postprocess.lexicon import Lexicon, read_word_list
from ocrbench.postprocess.steps import Pipeline, pipeline_from_config

def load_pipeline(*, steps: str | None, config: Path | None, word_list: Path | None) -> Pipeline:
    """The pipeline the options describe (``--steps`` wins over the config's list). Raises OcrbenchError."""
    table: dict[str, Any] = {}
    if config is not None:
        try:
            doc = tomllib.loads(config.read_text(encoding="utf-8"))
        except OSError as e:
            raise InputError(config, f"cannot read: {e.strerror or e}") from e
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
            raise InputError(config, f"not valid TOML: {e}") from e
        table = dict(doc.get("postprocess", doc))
        if word_list is None and "word_list" in table:
            word_list = (config.parent / str(table["word_list"])).resolve()
    lexicon: Lexicon | None = read_word_list(word_list) if word_list is not None else None
    if steps is not None:
        table["steps"] = [s.strip() for s in steps.split(",") if s.strip()]
    if "steps" not in table:
        table["steps"] = ["unicode", "whitespace"] + (["hyphen_join", "lexicon"] if lexicon else [])
    return pipeline_from_config(table, lexicon=lexicon)
