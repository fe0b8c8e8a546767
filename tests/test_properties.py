"""Property tests (hypothesis) on the card parser, the ground-truth reader and the accuracy core.

References outside the code under test: Python's tomllib and json (TOML 1.0 / RFC 8259 text),
hashlib (FIPS 180-4 sha256), Python's strict UTF-8 decoder (RFC 3629: where the first invalid
byte is), the editdistance library (Levenshtein distance with unit costs), and the definition
of a corpus rate as total edits over total reference characters (sum, then divide: common
practice in machine-translation and OCR evaluation).
"""

from __future__ import annotations

import codecs
import hashlib
import json
import math
from pathlib import Path

import editdistance
import pytest
from hypothesis import HealthCheck, assume, given, settings, strategies as st

import _tiny_models as tm
from ocrbench.accuracy.score import score_pages
from ocrbench.io.text import decode_text, read_text_lines
from ocrbench.errors import CardError, TextFileError
from ocrbench.recognisers.card import KINDS, load_card

FAST = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
SLOW = settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


# --------------------------------------------------------------------------- card parser


@pytest.fixture(scope="module")
def ctc_folder(tmp_path_factory) -> Path:
    return tm.write_ctc(tmp_path_factory.mktemp("card") / "ctc")


toml_values = st.one_of(
    st.integers(min_value=-10, max_value=10**6).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(lambda f: "nan" if math.isnan(f) else
                                                       ("inf" if f == math.inf else "-inf" if f == -math.inf
                                                        else repr(f))),
    st.text(max_size=12).map(json.dumps),                    # a JSON string is a valid TOML basic string
    st.booleans().map(lambda b: "true" if b else "false"),
    st.lists(st.integers(-3, 3), max_size=3).map(lambda v: "[" + ", ".join(map(str, v)) + "]"),
    st.just('"../../../etc/passwd"'),
    st.just('"model.onnx"'), st.just('"alphabet.txt"'), st.just('"TBC"'), st.just('"seq"'),
)


@st.composite
def mutated_card(draw) -> str:
    lines = tm.CTC_CARD.splitlines()
    for _ in range(draw(st.integers(1, 3))):
        i = draw(st.integers(0, len(lines) - 1))
        how = draw(st.sampled_from(["drop", "value", "insert", "garble"]))
        if how == "drop":
            lines.pop(i)
        elif how == "value" and "=" in lines[i]:
            lines[i] = lines[i].split("=", 1)[0] + "= " + draw(toml_values)
        elif how == "insert":
            lines.insert(i, draw(st.sampled_from(["extra", "height", "name", "kind", "[seq]", "[ctc]", "blank"]))
                         + " = " + draw(toml_values))
        else:
            pos = draw(st.integers(0, len(lines[i])))
            lines[i] = lines[i][:pos] + draw(st.text(max_size=4)) + lines[i][pos:]
        if not lines:
            break
    return "\n".join(lines) + "\n"


@SLOW
@given(text=mutated_card())
def test_any_card_text_gives_a_card_or_a_card_error(ctc_folder, text):
    (ctc_folder / "card.toml").write_text(text, encoding="utf-8")
    try:
        card = load_card(ctc_folder)
    except CardError as e:
        assert e.path and e.reason                          # names the file, says why
        return
    finally:
        (ctc_folder / "card.toml").write_text(tm.CTC_CARD, encoding="utf-8")
    # Accepted: it is valid TOML (Python's reference parser agrees) and the card is consistent.
    import tomllib

    tomllib.loads(text)
    assert card.kind in KINDS and card.name.strip() and card.input.height > 0
    for role, path in card.files.items():
        assert card.file_hashes[role] == hashlib.sha256(Path(path).read_bytes()).hexdigest()


symbol = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=3)


@SLOW
@given(symbols=st.lists(symbol, min_size=3, max_size=9, unique=True), blank=st.integers(0, 8),
       model_classes=st.integers(3, 9))
def test_alphabet_is_read_as_written_and_must_match_the_model(tmp_path_factory, symbols, blank, model_classes):
    folder = tmp_path_factory.mktemp("alpha")
    tm._save(tm.ctc_model(classes=model_classes), folder / "model.onnx")
    # one JSON string per line (RFC 8259), written by Python's json module
    (folder / "alphabet.txt").write_text("".join(json.dumps(s) + "\n" for s in symbols), encoding="utf-8")
    (folder / "card.toml").write_text(tm.CTC_CARD.replace("blank_index = 0", f"blank_index = {blank}"),
                                      encoding="utf-8")
    if blank >= len(symbols):
        with pytest.raises(CardError, match="blank_index"):
            load_card(folder)
        return
    if model_classes != len(symbols):
        with pytest.raises(CardError, match=f"has {len(symbols)} entries .* scores {model_classes} classes"):
            load_card(folder)
        return
    card = load_card(folder)
    expect = list(symbols)
    expect[blank] = ""
    assert list(card.ctc.symbols) == expect and card.ctc.blank_index == blank


# --------------------------------------------------------------------------- ground-truth reader

line_text = st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\n"), max_size=20)


@FAST
@given(lines=st.lists(line_text, max_size=8), eol=st.sampled_from(["\n", "\r\n", "\r"]), bom=st.booleans(),
       final=st.booleans())
def test_truth_files_read_back_as_written(tmp_path_factory, lines, eol, bom, final):
    # A file without a final line break cannot end in an empty line (it would not exist).
    assume(final or not lines or lines[-1] != "")
    assume(not (lines == [""] and not final))
    body = eol.join(lines) + (eol if final and lines else "")
    data = (codecs.BOM_UTF8 if bom else b"") + body.encode("utf-8")
    path = tmp_path_factory.mktemp("gt") / "t.txt"
    path.write_bytes(data)
    assert read_text_lines(path) == lines
    assert decode_text(data) == lines


@FAST
@given(data=st.binary(max_size=40), bom=st.booleans())
def test_undecodable_truth_names_the_first_bad_byte(data, bom):
    raw = (codecs.BOM_UTF8 if bom else b"") + data
    skip = 3 if raw.startswith(codecs.BOM_UTF8) else 0      # one leading BOM is a signature, not text
    try:
        raw[skip:].decode("utf-8")                            # Python's strict decoder is the reference
        expected = None
    except UnicodeDecodeError as e:
        expected = skip + e.start
    if expected is None:
        out = decode_text(raw, "t.txt")
        assert all("\n" not in ln and "\r" not in ln for ln in out)
    else:
        with pytest.raises(TextFileError, match=f"at byte offset {expected} ") as ei:
            decode_text(raw, "t.txt")
        assert ei.value.path == "t.txt"


# --------------------------------------------------------------------------- accuracy core

one_line = st.text(alphabet="ab1 2£.,-Kx", min_size=0, max_size=16).filter(lambda s: "\n" not in s)
page = st.tuples(one_line.filter(lambda s: s.strip() != "" and s == s.strip()),
                 one_line.filter(lambda s: s.strip() != "" and s == s.strip()))


@FAST
@given(pages=st.lists(page, min_size=1, max_size=6), classes=st.booleans())
def test_corpus_cer_is_total_edits_over_total_reference_characters(pages, classes):
    inputs = [(f"p{i}", ref, hyp) for i, (ref, hyp) in enumerate(pages)]
    s = score_pages(inputs, profile="exact", classes=classes, n_boot=200).summary
    edits = sum(editdistance.eval(r, h) for r, h in pages)
    chars = sum(len(r) for r, _ in pages)
    wedits = sum(editdistance.eval(r.split(), h.split()) for r, h in pages)
    words = sum(len(r.split()) for r, _ in pages)
    assert s["char_edits"] == edits and s["ref_chars"] == chars
    assert s["cer"] == pytest.approx(edits / chars)
    assert s["word_edits"] == wedits and s["wer"] == pytest.approx(wedits / words)
    if classes:
        assert s["subs"] + s["dels"] + s["ins"] == edits and s["hits"] + s["subs"] + s["dels"] == chars
    if len(pages) >= 2:
        assert s["cer_low"] <= s["cer"] <= s["cer_high"]


@pytest.mark.slow
@FAST
@given(pages=st.lists(page, min_size=2, max_size=6), cut=st.integers(1, 5), data=st.data())
def test_scores_add_up_over_any_split_and_ignore_page_order(pages, cut, data):
    cut = min(cut, len(pages) - 1)
    inputs = [(f"p{i}", ref, hyp) for i, (ref, hyp) in enumerate(pages)]
    whole = score_pages(inputs, profile="exact", n_boot=100).summary
    a = score_pages(inputs[:cut], profile="exact", n_boot=100).summary
    b = score_pages(inputs[cut:], profile="exact", n_boot=100).summary
    for key in ("char_edits", "ref_chars", "word_edits", "ref_words", "subs", "dels", "ins", "hits"):
        assert whole[key] == a[key] + b[key], key
    shuffled = data.draw(st.permutations(inputs))
    again = score_pages(shuffled, profile="exact", n_boot=100).summary
    assert again["cer"] == whole["cer"] and again["wer"] == whole["wer"]


@FAST
@given(pages=st.lists(page, min_size=1, max_size=5))
def test_perfect_text_scores_zero(pages):
    s = score_pages([(f"p{i}", r, r) for i, (r, _) in enumerate(pages)], profile="exact", n_boot=100).summary
    assert s["cer"] == 0 and s["wer"] == 0 and s["char_edits"] == 0 and s["line_count_mismatch"] == []
