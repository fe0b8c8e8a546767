"""The post-processing pipeline: named, documented steps applied to a page of recognised lines.

Why a pipeline of named steps: every number ocrbench reports must say how the
text was made, so a pipeline is built from a list of step names with options
(from code or a TOML table) and writes itself down as a recipe string, e.g.::

    pp1|unicode(form=NFC)|whitespace|hyphen_join(lexicon=3f2a9c0b11de)|lexicon(gate=0.8,...)

Steps work on a whole page (a list of :class:`LineText`), because joining a word
hyphenated at a line end needs the next line. Lines are never added or removed,
so line numbers stay those of the recogniser (the store keys lines by number).
Per-character confidences travel with the characters through every step, so
the lexicon's confidence gate still sees the recogniser's doubt after the text
has been normalised.

Steps (see each class for details):

=================  ==========================================================
``unicode``        Unicode normalisation (NFC by default).
``whitespace``     any Unicode space becomes one ASCII space; ends trimmed;
                   zero-width characters dropped.
``variants``       historical character variants mapped to modern letters on
                   request (long s, ligatures; æ/œ only if asked).
``hyphen_join``    a word split by a hyphen at a line end is joined, only when
                   the lexicon confirms the joined word.
``lexicon``        doubtful words replaced by their nearest listed word
                   (:mod:`ocrbench.postprocess.lexicon`).
``ledger_repair``  on a page that does not balance, one digit changed when it
                   is the only low-confidence digit whose change balances it.
=================  ==========================================================
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

from ocrbench.errors import PostprocessError
from ocrbench.ledger import balance as _ledger
from ocrbench.postprocess.lexicon import Lexicon, LexiconOptions, correct_line, core_span, is_word

RECIPE_VERSION = "pp1"


@dataclass(frozen=True)
class LineText:
    """One recognised line: text, optional per-character confidences (aligned), optional line confidence."""

    text: str
    confidences: tuple[float, ...] | None = None
    line_confidence: float | None = None

    def __post_init__(self) -> None:
        if self.confidences is not None:
            if len(self.confidences) != len(self.text):
                # misaligned confidences cannot be trusted character by character
                object.__setattr__(self, "confidences", None)
            else:
                object.__setattr__(self, "confidences", tuple(float(c) for c in self.confidences))


@dataclass(frozen=True)
class Change:
    """One change a step made to one line (for the audit trail and tests)."""

    step: str
    line_no: int          # 0-based
    before: str
    after: str
    detail: str = ""


def _map_chars(line: LineText, fn: Callable[[str], str]) -> LineText:
    """Replace each character by ``fn(ch)`` (any length); new characters keep the old one's confidence."""
    out: list[str] = []
    confs: list[float] = []
    for i, ch in enumerate(line.text):
        rep = fn(ch)
        out.append(rep)
        if line.confidences is not None:
            confs.extend([line.confidences[i]] * len(rep))
    return LineText("".join(out), tuple(confs) if line.confidences is not None else None, line.line_confidence)


class Step:
    """Base of all steps: a name, options for the recipe, and ``apply`` on a page."""

    name: str = ""

    def options(self) -> dict[str, Any]:
        return {}

    def recipe(self) -> str:
        opts = self.options()
        if not opts:
            return self.name
        return f"{self.name}(" + ",".join(f"{k}={_fmt(v)}" for k, v in opts.items()) + ")"

    def apply(self, lines: list[LineText]) -> tuple[list[LineText], list[Change]]:
        raise NotImplementedError


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, (list, tuple)):
        return "+".join(_fmt(x) for x in v)
    if isinstance(v, Mapping):
        return "+".join(f"{k}>{x}" for k, x in sorted(v.items()))
    return str(v)


class _PerLine(Step):
    def transform(self, line: LineText) -> LineText:
        raise NotImplementedError

    def apply(self, lines: list[LineText]) -> tuple[list[LineText], list[Change]]:
        out, changes = [], []
        for i, ln in enumerate(lines):
            new = self.transform(ln)
            if new.text != ln.text:
                changes.append(Change(self.name, i, ln.text, new.text))
            out.append(new)
        return out, changes


@dataclass
class UnicodeStep(_PerLine):
    """Unicode normalisation (UAX #15). NFC by default: composed accents, nothing else changes.

    NFKC/NFKD also fold compatibility characters, which on ledgers is harmful
    (``½`` becomes ``1⁄2``) and also maps the long s and ligatures; prefer NFC
    plus the ``variants`` step, which maps only what it is asked to.
    Confidences: each character sequence that starts with a non-combining
    character is normalised on its own and its characters take the lowest
    confidence of the sequence; if that does not reproduce the normalisation of
    the whole line (rare scripts), the line's confidences are dropped.
    """

    form: str = "NFC"
    name: str = "unicode"

    def __post_init__(self) -> None:
        if self.form not in ("NFC", "NFD", "NFKC", "NFKD"):
            raise PostprocessError(f"unicode step: form must be NFC, NFD, NFKC or NFKD, not {self.form!r}")

    def options(self) -> dict[str, Any]:
        return {"form": self.form}

    def transform(self, line: LineText) -> LineText:
        whole = unicodedata.normalize(self.form, line.text)
        if whole == line.text:
            return line
        if line.confidences is None:
            return LineText(whole, None, line.line_confidence)
        segs: list[tuple[int, int]] = []
        for i, ch in enumerate(line.text):
            if i == 0 or unicodedata.combining(ch) == 0:
                segs.append((i, i + 1))
            else:
                segs[-1] = (segs[-1][0], i + 1)
        out: list[str] = []
        confs: list[float] = []
        for a, b in segs:
            piece = unicodedata.normalize(self.form, line.text[a:b])
            out.append(piece)
            confs.extend([min(line.confidences[a:b])] * len(piece))
        text = "".join(out)
        if text != whole:
            return LineText(whole, None, line.line_confidence)
        return LineText(text, tuple(confs), line.line_confidence)


_ZERO_WIDTH = {"\u200b", "\u200c", "\u200d", "\u2060", "\ufeff"}


@dataclass
class WhitespaceStep(_PerLine):
    """Whitespace: any Unicode space (tab, no-break, thin ...) becomes one ASCII space, runs collapse
    to one, the ends are trimmed, zero-width characters are dropped.

    Why: hand-keyed ground truth puts one space between fields however wide the gap on
    the page (common practice in keying ground truth), so recognisers that emit a space per gap
    width would otherwise be charged for layout, not reading.
    """

    name: str = "whitespace"

    def transform(self, line: LineText) -> LineText:
        out: list[str] = []
        confs: list[float] = []
        has = line.confidences is not None
        for i, ch in enumerate(line.text):
            if ch in _ZERO_WIDTH:
                continue
            if ch.isspace():
                if not out or out[-1] == " ":
                    continue
                ch = " "
            out.append(ch)
            if has:
                confs.append(line.confidences[i])  # type: ignore[index]
        if out and out[-1] == " ":
            out.pop()
            if has:
                confs.pop()
        return LineText("".join(out), tuple(confs) if has else None, line.line_confidence)


#: Historical variants and what each maps to. Groups can be switched on one by one.
VARIANT_GROUPS: dict[str, dict[str, str]] = {
    "long_s": {"ſ": "s", "ẜ": "s", "ẝ": "s", "ẛ": "ṡ"},
    "ligatures": {"ﬀ": "ff", "ﬁ": "fi", "ﬂ": "fl", "ﬃ": "ffi", "ﬄ": "ffl", "ﬅ": "st", "ﬆ": "st"},
    "r_rotunda": {"ꝛ": "r", "Ꝛ": "R"},
    "ae_oe": {"æ": "ae", "Æ": "AE", "œ": "oe", "Œ": "OE"},
}
DEFAULT_VARIANT_GROUPS: tuple[str, ...] = ("long_s", "ligatures", "r_rotunda")


@dataclass
class VariantsStep(_PerLine):
    """Historical character variants mapped to modern letters, on request.

    Groups (:data:`VARIANT_GROUPS`): ``long_s`` (ſ -> s), ``ligatures``
    (ﬁ -> fi, ﬂ -> fl, ﬀ ﬃ ﬄ ﬅ ﬆ), ``r_rotunda`` (ꝛ -> r), and ``ae_oe``
    (æ -> ae, œ -> oe), off by default because æ and œ are letters of their own
    in several languages. ``extra`` adds an archive's own mappings.
    Use it when the keying guidelines modernise spelling; leave it out
    when they keep the variants.
    """

    groups: Sequence[str] = DEFAULT_VARIANT_GROUPS
    extra: Mapping[str, str] = field(default_factory=dict)
    name: str = "variants"

    def __post_init__(self) -> None:
        unknown = [g for g in self.groups if g not in VARIANT_GROUPS]
        if unknown:
            raise PostprocessError(f"variants step: unknown group(s) {', '.join(unknown)}; "
                                   f"known: {', '.join(VARIANT_GROUPS)}")
        bad = [k for k in self.extra if len(k) != 1]
        if bad:
            raise PostprocessError(f"variants step: 'extra' keys must be single characters, not {bad!r}")
        table: dict[str, str] = {}
        for g in self.groups:
            table.update(VARIANT_GROUPS[g])
        table.update(self.extra)
        self._table = table

    def options(self) -> dict[str, Any]:
        opts: dict[str, Any] = {"groups": list(self.groups)}
        if self.extra:
            opts["extra"] = dict(self.extra)
        return opts

    def transform(self, line: LineText) -> LineText:
        if not any(ch in self._table for ch in line.text):
            return line
        return _map_chars(line, lambda ch: self._table.get(ch, ch))


HYPHENS = "-\u00ad\u2010\u2011\u2e17¬="


@dataclass
class HyphenJoinStep(Step):
    """Join a word hyphenated at a line end, when the lexicon confirms the joined word.

    ``"... paid to Tarn-"`` + ``"by for hemp"`` becomes ``"... paid to Tarnby"`` +
    ``"for hemp"`` if "Tarnby" is listed. The joined word stays on the line where
    it begins and the continuation leaves the next line (lines are never merged
    or dropped, so a line emptied this way stays as an empty line). Without the
    lexicon's confirmation nothing changes: a line-end hyphen may belong to a
    compound ("cross-" + "roads") or to a dash.
    """

    lexicon: Lexicon | None = None
    hyphens: str = HYPHENS
    name: str = "hyphen_join"

    def options(self) -> dict[str, Any]:
        return {"lexicon": self.lexicon.digest if self.lexicon is not None else "none"}

    def apply(self, lines: list[LineText]) -> tuple[list[LineText], list[Change]]:
        out = list(lines)
        changes: list[Change] = []
        if self.lexicon is None:
            return out, changes
        for i in range(len(out) - 1):
            cur, nxt = out[i], out[i + 1]
            head = cur.text.rstrip()
            if len(head) < 2 or head[-1] not in self.hyphens:
                continue
            start = max(head.rfind(" "), head.rfind("\t")) + 1
            first = head[start:-1]
            a, _ = core_span(first)
            first_core = first[a:]
            body = nxt.text.lstrip()
            lead = len(nxt.text) - len(body)
            if not body:
                continue
            end = len(body.split(None, 1)[0])
            second = body[:end]
            sa, sb = core_span(second)
            second_core = second[sa:sb]
            if sa != 0 or not is_word(first_core) or not is_word(second_core):
                continue
            joined = first_core + second_core
            if joined not in self.lexicon:
                continue
            trail = second[sb:]                        # punctuation after the continuation
            new_cur_text = head[:-1] + second_core + trail
            rest_start = lead + end
            rest = nxt.text[rest_start:]
            rest_stripped = rest.lstrip()
            cut = rest_start + (len(rest) - len(rest_stripped))
            new_nxt_text = nxt.text[cut:]
            c_cur = c_nxt = None
            if cur.confidences is not None and nxt.confidences is not None:
                c_cur = cur.confidences[:len(head) - 1] + nxt.confidences[lead:lead + end]
                c_nxt = nxt.confidences[cut:]
            new_cur = LineText(new_cur_text, c_cur, cur.line_confidence)
            new_nxt = LineText(new_nxt_text, c_nxt, nxt.line_confidence)
            changes.append(Change(self.name, i, cur.text, new_cur.text, f"joined {joined!r}"))
            changes.append(Change(self.name, i + 1, nxt.text, new_nxt.text, f"moved {second!r} up"))
            out[i], out[i + 1] = new_cur, new_nxt
        return out, changes


@dataclass
class LexiconStep(Step):
    """Replace low-confidence words by their nearest listed word (rules in ocrbench.postprocess.lexicon).

    Digits are never changed. Options: ``gate`` (only tokens below this
    confidence), ``max_distance`` (edits), ``max_share`` (edits per letter),
    ``min_length`` (shorter tokens stay).
    """

    lexicon: Lexicon | None = None
    gate: float = LexiconOptions.gate
    max_distance: int = LexiconOptions.max_distance
    max_share: float = LexiconOptions.max_share
    min_length: int = LexiconOptions.min_length
    name: str = "lexicon"

    def __post_init__(self) -> None:
        if self.lexicon is None:
            raise PostprocessError("lexicon step needs a word list (give one with the lexicon option)")
        if not 0.0 <= self.gate <= 1.0:
            raise PostprocessError(f"lexicon step: gate must be within 0..1, not {self.gate}")
        self._opts = LexiconOptions(gate=self.gate, max_distance=self.max_distance,
                                    max_share=self.max_share, min_length=self.min_length)

    def options(self) -> dict[str, Any]:
        return {"lexicon": self.lexicon.digest, "gate": self.gate,  # type: ignore[union-attr]
                "max_distance": self.max_distance, "max_share": self.max_share, "min_length": self.min_length}

    def apply(self, lines: list[LineText]) -> tuple[list[LineText], list[Change]]:
        out, changes = [], []
        for i, ln in enumerate(lines):
            text, confs, fixes = correct_line(ln.text, self.lexicon, confidences=ln.confidences,  # type: ignore[arg-type]
                                              line_confidence=ln.line_confidence, options=self._opts)
            if fixes:
                new = LineText(text, tuple(confs) if confs is not None else None, ln.line_confidence)
                detail = "; ".join(f"{f.old}->{f.new} (distance {f.distance})" for f in fixes)
                changes.append(Change(self.name, i, ln.text, new.text, detail))
                out.append(new)
            else:
                out.append(ln)
        return out, changes


@dataclass
class LedgerRepairStep(Step):
    """On a page that does not balance, change one digit when the ledger supports it.

    The page is checked (:func:`ledger.check_page`); every one-digit change of one
    amount that would balance it is listed (:func:`ledger.single_digit_fixes`);
    those whose digit's confidence is below ``gate`` are kept; if exactly one
    remains it is applied. Digits are changed by nothing else in the pipeline.
    Confidence of the digit: its per-character confidence, else the line's;
    unknown confidence never passes (a blind guess among candidates is not
    supported by the ledger).
    """

    gate: float = 0.5
    decimal_mark: str = "."
    name: str = "ledger_repair"

    def options(self) -> dict[str, Any]:
        return {"gate": self.gate}

    def apply(self, lines: list[LineText]) -> tuple[list[LineText], list[Change]]:
        out = list(lines)
        bal = _ledger.check_page([ln.text for ln in out], decimal_mark=self.decimal_mark)
        fixes = _ledger.single_digit_fixes(bal)
        doubtful = []
        for fx in fixes:
            ln = out[fx.line_no]
            conf = ln.confidences[fx.char_index] if ln.confidences is not None else ln.line_confidence
            if conf is not None and conf < self.gate:
                doubtful.append(fx)
        if len(doubtful) != 1:
            return out, []
        fx = doubtful[0]
        ln = out[fx.line_no]
        new = LineText(fx.apply(ln.text), ln.confidences, ln.line_confidence)
        out[fx.line_no] = new
        return out, [Change(self.name, fx.line_no, ln.text, new.text,
                            f"digit {fx.old}->{fx.new} at {fx.char_index} balances the page")]


# --------------------------------------------------------------------------- registry and pipeline

#: Step name -> class. The class docstring is the step's documentation.
STEPS: dict[str, type[Step]] = {
    "unicode": UnicodeStep,
    "whitespace": WhitespaceStep,
    "variants": VariantsStep,
    "hyphen_join": HyphenJoinStep,
    "lexicon": LexiconStep,
    "ledger_repair": LedgerRepairStep,
}
_NEEDS_LEXICON = {"hyphen_join", "lexicon"}


def describe_steps() -> dict[str, str]:
    """Step name -> its documentation (first paragraph of the class docstring)."""
    return {n: " ".join((c.__doc__ or "").strip().split("\n\n")[0].split()) for n, c in STEPS.items()}


@dataclass(frozen=True)
class PageResult:
    """A post-processed page: lines (same count as given) and every change made."""

    lines: list[LineText]
    changes: list[Change]

    @property
    def texts(self) -> list[str]:
        return [ln.text for ln in self.lines]


@dataclass(frozen=True)
class Pipeline:
    """An ordered list of steps. Build with :func:`build_pipeline` or :func:`pipeline_from_config`."""

    steps: tuple[Step, ...]

    @property
    def recipe(self) -> str:
        """A string naming every step and option, so two outputs can be compared."""
        return "|".join([RECIPE_VERSION] + [s.recipe() for s in self.steps])

    def apply_page(self, lines: Sequence[LineText | str]) -> PageResult:
        page = [ln if isinstance(ln, LineText) else LineText(ln) for ln in lines]
        changes: list[Change] = []
        for step in self.steps:
            page, ch = step.apply(page)
            if len(page) != len(lines):   # a step must never add or drop lines
                raise PostprocessError(f"step {step.name} changed the number of lines")
            changes.extend(ch)
        return PageResult(page, changes)

    def __call__(self, texts: Sequence[str], confidences: Sequence[float | None] | None = None,
                 char_confidences: Sequence[Sequence[float] | None] | None = None) -> list[str]:
        """The runner's post-processing hook: a page's raw texts and line confidences in, texts out."""
        return self.apply_texts(texts, confidences=confidences, char_confidences=char_confidences)

    def apply_texts(self, lines: Sequence[str], *, confidences: Sequence[float | None] | None = None,
                    char_confidences: Sequence[Sequence[float] | None] | None = None) -> list[str]:
        """Convenience: plain texts in, texts out (optional line / per-character confidences)."""
        page = [LineText(t,
                         tuple(char_confidences[i]) if char_confidences is not None and char_confidences[i] is not None else None,
                         confidences[i] if confidences is not None else None)
                for i, t in enumerate(lines)]
        return self.apply_page(page).texts


def _make_step(name: str, options: Mapping[str, Any], lexicon: Lexicon | None) -> Step:
    cls = STEPS.get(name)
    if cls is None:
        raise PostprocessError(f"unknown post-processing step {name!r}; known steps: {', '.join(STEPS)}")
    opts = dict(options)
    if name in _NEEDS_LEXICON:
        opts.setdefault("lexicon", lexicon)
        if name == "hyphen_join" and opts["lexicon"] is None:
            raise PostprocessError("hyphen_join step needs a word list to confirm joined words")
    allowed = {f for f in cls.__dataclass_fields__ if f != "name"}  # type: ignore[attr-defined]
    bad = sorted(set(opts) - allowed)
    if bad:
        raise PostprocessError(f"step {name!r}: unknown option(s) {', '.join(bad)}; "
                               f"known: {', '.join(sorted(allowed)) or 'none'}")
    try:
        return cls(**opts)  # type: ignore[call-arg]
    except TypeError as e:
        raise PostprocessError(f"step {name!r}: {e}") from e


def build_pipeline(steps: Sequence[str | Mapping[str, Any]], *, lexicon: Lexicon | None = None,
                   options: Mapping[str, Mapping[str, Any]] | None = None) -> Pipeline:
    """Build a pipeline from step names (or ``{"step": name, **options}`` tables).

    ``options`` maps a step name to its options (as in a TOML table per step);
    options written inline win. ``lexicon`` is handed to the steps that need one.
    """
    built: list[Step] = []
    for item in steps:
        if isinstance(item, str):
            name, inline = item, {}
        elif isinstance(item, Mapping) and "step" in item:
            name = str(item["step"])
            inline = {k: v for k, v in item.items() if k != "step"}
        else:
            raise PostprocessError(f"a step must be a name or a table with a 'step' key, not {item!r}")
        opts = dict((options or {}).get(name, {}))
        opts.update(inline)
        built.append(_make_step(name, opts, lexicon))
    return Pipeline(tuple(built))


def pipeline_from_config(table: Mapping[str, Any], *, lexicon: Lexicon | None = None) -> Pipeline:
    """Build from a TOML-style table::

        [postprocess]
        steps = ["unicode", "whitespace", "hyphen_join", "lexicon"]
        [postprocess.lexicon]
        gate = 0.7

    Keys besides ``steps`` are per-step option tables. (A key ``word_list``
    naming the lexicon file is for the caller to read; it is ignored here.)
    """
    if "steps" not in table:
        raise PostprocessError("post-processing table has no 'steps' list")
    steps = table["steps"]
    if isinstance(steps, str) or not isinstance(steps, Sequence):
        raise PostprocessError("'steps' must be a list of step names")
    options = {k: v for k, v in table.items() if k in STEPS and isinstance(v, Mapping)}
    unknown = [k for k in table if k not in STEPS and k not in ("steps", "word_list")]
    if unknown:
        raise PostprocessError(f"post-processing table: unknown key(s) {', '.join(unknown)}")
    return build_pipeline(steps, lexicon=lexicon, options=options)


def default_pipeline(lexicon: Lexicon | None = None) -> Pipeline:
    """NFC + whitespace, plus hyphen joining and lexicon correction when a word list is given."""
    names: list[str] = ["unicode", "whitespace"]
    if lexicon is not None:
        names += ["hyphen_join", "lexicon"]
    return build_pipeline(names, lexicon=lexicon)
