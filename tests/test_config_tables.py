"""The one typed-table checker shared by cards, plan files and post-processing recipes."""

from __future__ import annotations

import math

import pytest

from ocrbench.errors import ConfigError
from ocrbench.io.config import Key, check_table

SCHEMA = {
    "archive": {"pages": Key((int,), low=1), "page_size": Key((str,))},
    "resources": {"workers": Key((int,), default=1, low=1), "price": Key((float,), low=0.0)},
    "mode": Key((str,), default="fast", choices=("fast", "slow")),
    "profiles": Key((dict,), default={}, free=True),
}


def test_defaults_filled_and_int_accepted_as_float() -> None:
    out = check_table({"archive": {"pages": 10}, "resources": {"price": 2}}, SCHEMA, source="p.toml")
    assert out["archive"] == {"pages": 10, "page_size": None}
    assert out["resources"] == {"workers": 1, "price": 2}
    assert out["mode"] == "fast"


@pytest.mark.parametrize("doc, words", [
    ({"archive": {"pagez": 1000}}, ["p.toml", "archive.pagez", "archive.pages"]),
    ({"resources": {"worker": 4}}, ["resources.worker", "resources.workers"]),
    ({"archiv": {}}, ["'archiv'", "'archive'"]),
    ({"archive": {"pages": "many"}}, ["archive.pages", "an integer"]),
    ({"archive": {"pages": 0}}, ["archive.pages", ">= 1"]),
    ({"archive": {"pages": True}}, ["archive.pages", "an integer"]),
    ({"resources": {"price": math.nan}}, ["resources.price", "finite"]),
    ({"resources": {"price": math.inf}}, ["resources.price", "finite"]),
    ({"mode": "fsat"}, ["mode", "'fast'"]),
    ({"archive": 3}, ["archive must be a table"]),
])
def test_every_problem_names_file_path_and_fix(doc, words) -> None:
    with pytest.raises(ConfigError) as e:
        check_table(doc, SCHEMA, source="p.toml")
    for w in words:
        assert w in str(e.value)
