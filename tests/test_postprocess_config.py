"""The post-processing recipe file goes through the one typed-table checker (ocrbench.io.config)."""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from ocrbench.cli.app import app
from ocrbench.errors import ConfigError
from ocrbench.postprocess.config import load_pipeline, read_postprocess_table


def _write(tmp_path, text: str):
    p = tmp_path / "post.toml"
    p.write_text(text, encoding="utf-8")
    return p


@pytest.mark.parametrize("text, words", [
    ('[postprocess]\nstep = ["whitespace"]\n', ["post.toml", "postprocess.step", "'postprocess.steps'"]),
    ('[postprocess]\nsteps = ["lexicon"]\nwordlist = "w.txt"\n', ["postprocess.wordlist", "postprocess.word_list"]),
    ('[postprocess]\nsteps = ["lexicon"]\n[postprocess.lexicn]\ngate = 0.5\n',
     ["postprocess.lexicn", "postprocess.lexicon"]),
    ('[postprocess]\nsteps = ["lexicon"]\n[postprocess.lexicon]\ngates = 0.5\n',
     ["postprocess.lexicon.gates", "postprocess.lexicon.gate"]),
    ('[postprocess]\nsteps = ["lexicon"]\n[postprocess.lexicon]\ngate = "high"\n',
     ["postprocess.lexicon.gate must be a number"]),
    ('[postprocess]\nsteps = "whitespace"\n', ["postprocess.steps must be a list"]),
    ('stepz = ["whitespace"]\n', ["unknown key 'stepz'", "'steps'"]),
])
def test_unknown_or_wrong_keys_name_path_and_nearest(tmp_path, text, words):
    p = _write(tmp_path, text)
    with pytest.raises(ConfigError) as e:
        load_pipeline(steps=None, config=p, word_list=None)
    assert all(w in str(e.value) for w in words), str(e.value)


def test_valid_table_keeps_only_what_was_written(tmp_path):
    p = _write(tmp_path, '[postprocess]\nsteps = ["whitespace", "variants"]\n[postprocess.variants]\n'
                         'groups = ["long_s"]\n[other]\nanything = 1\n')
    assert read_postprocess_table(p) == {"steps": ["whitespace", "variants"], "variants": {"groups": ["long_s"]}}
    pipe = load_pipeline(steps=None, config=p, word_list=None)
    assert [s.name for s in pipe.steps] == ["whitespace", "variants"]


def test_cli_usage_error_names_the_key(tmp_path):
    src = tmp_path / "in"
    src.mkdir()
    (src / "p.txt").write_text("some  text\n", encoding="utf-8")
    p = _write(tmp_path, '[postprocess]\nsteps = ["whitespace"]\n[postprocess.whitespace]\ncollapse = true\n')
    r = CliRunner().invoke(app, ["postprocess", str(src), str(tmp_path / "o"), "--config", str(p)])
    assert r.exit_code == 2
    assert "post.toml" in r.stderr and "postprocess.whitespace.collapse" in r.stderr
