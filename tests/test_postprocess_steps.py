"""The post-processing pipeline: each step, confidences carried along, recipes and configuration."""

from __future__ import annotations

import tomllib
import unicodedata

import pytest
from hypothesis import given, settings, strategies as st

from ocrbench.errors import PostprocessError
from ocrbench.ledger import balance as ledger
from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.postprocess.steps import (STEPS, LineText, build_pipeline, default_pipeline, describe_steps,
                                        pipeline_from_config)

LEX = Lexicon.from_words(["Tarnby", "Portley", "cordage", "warehouse", "hemp"])


@settings(max_examples=200, deadline=None)
@given(st.text(alphabet=st.sampled_from(list("aeoAE ſ½12") + ["\u0301", "\u0308", "\u0327", "é", "Å", "\u212b",
                                                             "ﬁ", "\u00a0"]), max_size=30),
       st.sampled_from(["NFC", "NFD", "NFKC", "NFKD"]))
def test_unicode_step_matches_unicodedata(text, form):
    # Reference: Python's unicodedata.normalize (UAX #15); confidences stay aligned with the text.
    p = build_pipeline([{"step": "unicode", "form": form}])
    line = LineText(text, tuple(0.5 + 0.01 * i for i in range(len(text))), 0.7)
    out = p.apply_page([line]).lines[0]
    assert out.text == unicodedata.normalize(form, text)
    assert out.confidences is None or len(out.confidences) == len(out.text)


def test_unicode_confidence_of_a_composed_character():
    out = build_pipeline(["unicode"]).apply_page([LineText("Cafe\u0301 x", (0.9, 0.9, 0.9, 0.8, 0.3, 0.9, 0.9))])
    assert out.lines[0].text == "Café x"
    assert out.lines[0].confidences == (0.9, 0.9, 0.9, 0.3, 0.9, 0.9)   # é takes the weaker of e and the accent


def test_whitespace_step():
    p = build_pipeline(["whitespace"])
    text = "  Jan 9\t\tL.\u00a0Tarnby\u200b  soap   521.32 "
    line = LineText(text, tuple(float(i) for i in range(len(text))))
    out = p.apply_page([line]).lines[0]
    assert out.text == "Jan 9 L. Tarnby soap 521.32"
    assert len(out.confidences) == len(out.text)
    assert out.confidences[0] == 2.0            # 'J' keeps its own confidence after the trim


def test_variants_on_request():
    p = build_pipeline(["variants"])
    assert p.apply_texts(["ſome ﬁne ﬂax Cæsar"]) == ["some fine flax Cæsar"]
    p2 = build_pipeline([{"step": "variants", "groups": ["ae_oe"], "extra": {"ꝑ": "per"}}])
    assert p2.apply_texts(["ſome Cæsar ꝑ"]) == ["ſome Caesar per"]
    with pytest.raises(PostprocessError, match="unknown group"):
        build_pipeline([{"step": "variants", "groups": ["runes"]}])


def test_hyphen_join_only_when_the_lexicon_confirms():
    p = build_pipeline(["hyphen_join"], lexicon=LEX)
    res = p.apply_page(["paid to Tarn-", "by for hemp", "cross-", "roads mended", "ware-", "house, rent"])
    assert res.texts == ["paid to Tarnby", "for hemp", "cross-", "roads mended", "warehouse,", "rent"]
    assert {c.line_no for c in res.changes} == {0, 1, 4, 5}
    # a continuation that is the whole next line leaves it empty, never removes it
    assert p.apply_texts(["to Tarn-", "by"]) == ["to Tarnby", ""]
    # a digit after the hyphen is never joined
    assert p.apply_texts(["Tarn-", "6y"]) == ["Tarn-", "6y"]
    with pytest.raises(PostprocessError, match="word list"):
        build_pipeline(["hyphen_join"])


def test_hyphen_join_moves_confidences():
    p = build_pipeline(["hyphen_join"], lexicon=LEX)
    res = p.apply_page([LineText("to Tarn-", (1, 1, 1, 0.2, 0.3, 0.4, 0.5, 0.9)), LineText("by x", (0.6, 0.7, 1, 0.8))])
    assert res.lines[0].confidences == (1, 1, 1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7)
    assert res.lines[1].confidences == (0.8,)


def test_confidences_reach_the_lexicon_gate_through_normalisation():
    # The doubtful 'c' of "Portlcy" must still be seen as doubtful after whitespace moved it.
    p = build_pipeline(["whitespace", {"step": "lexicon", "gate": 0.5}], lexicon=LEX)
    text = "   Portlcy   Tarnbv"
    confs = [0.9] * 3 + [0.9] * 5 + [0.1] + [0.9] * 3 + [0.9] * 6 + [0.9]
    out = p.apply_page([LineText(text, tuple(confs), 0.1)])
    assert out.texts == ["Portley Tarnbv"]


def test_ledger_repair_changes_one_doubtful_digit():
    page = ["Marrowby & Kettle Cash Book Folio 1", "Date Payee Particulars Amount",
            "Jan 9 H. Brem hemp 12.50", "Jan 12 L. Tarnby soap 7.25", "Total 19.75"]
    misread = list(page)
    misread[3] = "Jan 12 L. Tarnby soap 1.25"
    confs = [tuple(0.99 for _ in t) for t in misread]
    c3 = list(confs[3])
    c3[misread[3].index("1.25")] = 0.2                            # the recogniser doubted that digit
    confs[3] = tuple(c3)
    p = build_pipeline(["ledger_repair"])
    res = p.apply_page([LineText(t, c) for t, c in zip(misread, confs)])
    assert res.texts == page
    assert ledger.check_page(res.texts).status == ledger.BALANCED
    # confident digits are not changed, whatever the arithmetic says
    sure = p.apply_page([LineText(t, tuple(0.99 for _ in t)) for t in misread])
    assert sure.texts == misread and sure.changes == []
    # no confidence at all: nothing changes
    assert p.apply_texts(misread) == misread


def test_lexicon_step_leaves_digits():
    p = build_pipeline([{"step": "lexicon", "gate": 1.0, "max_share": 1.0, "min_length": 1}], lexicon=LEX)
    assert p.apply_texts(["Portl3y 12.5O hemq"]) == ["Portl3y 12.5O hemp"]


def test_recipe_names_every_step_and_option():
    p = default_pipeline(LEX)
    r = p.recipe
    assert r.startswith("pp1|unicode(form=NFC)|whitespace|hyphen_join(lexicon=")
    assert f"lexicon(lexicon={LEX.digest},gate=0.8," in r
    assert build_pipeline(["unicode", "whitespace"]).recipe == default_pipeline().recipe
    # a different word list gives a different recipe
    assert default_pipeline(Lexicon.from_words(["hemp"])).recipe != r


def test_pipeline_from_toml():
    doc = tomllib.loads("""
        [postprocess]
        steps = ["unicode", "whitespace", "variants", "lexicon"]
        word_list = "words.txt"
        [postprocess.lexicon]
        gate = 0.6
        max_distance = 1
        [postprocess.variants]
        groups = ["long_s"]
    """)
    p = pipeline_from_config(doc["postprocess"], lexicon=LEX)
    assert [s.name for s in p.steps] == ["unicode", "whitespace", "variants", "lexicon"]
    assert "gate=0.6,max_distance=1" in p.recipe and "groups=long_s)" in p.recipe
    with pytest.raises(PostprocessError, match="unknown option"):
        pipeline_from_config({"steps": ["whitespace"], "whitespace": {"tabs": 4}})
    with pytest.raises(PostprocessError, match="unknown post-processing step 'spell'"):
        pipeline_from_config({"steps": ["spell"]})
    with pytest.raises(PostprocessError, match="needs a word list"):
        pipeline_from_config({"steps": ["lexicon"]})
    with pytest.raises(PostprocessError, match="no 'steps'"):
        pipeline_from_config({})


def test_every_step_is_documented_and_keeps_line_count():
    docs = describe_steps()
    assert set(docs) == set(STEPS) and all(len(d) > 20 for d in docs.values())
    p = build_pipeline(list(STEPS), lexicon=LEX)
    page = ["Tarn-", "by", "", "  ſome  ", "Total 1.00"]
    assert len(p.apply_page(page).lines) == len(page)
