"""Which engine reads which card: the registry that keeps ``base`` free of its subclasses.

``open_recogniser`` is the one way to get a ready recogniser from a card.
"""

from __future__ import annotations

from ocrbench.errors import CardError
from ocrbench.recognisers.base import EngineOptions, Recogniser
from ocrbench.recognisers.card import Card, first_line
from ocrbench.recognisers.ctc import CtcRecogniser
from ocrbench.recognisers.seq import SeqRecogniser

ENGINES: dict[str, type[Recogniser]] = {"ctc": CtcRecogniser, "seq": SeqRecogniser}


def open_recogniser(card: Card, *, options: EngineOptions | None = None, warm_up: bool = True) -> Recogniser:
    """Open the sessions a card needs and (by default) warm them up."""
    options = options or EngineOptions()
    engine = ENGINES.get(card.kind)
    if engine is None:  # load_card rejects other kinds already
        raise CardError(card.path, f"unknown kind {card.kind!r}")
    rec = engine(card, options)
    if warm_up:
        try:
            rec.warm_up()
        except CardError:
            raise
        except Exception as e:  # onnxruntime's own errors, shape errors: the card does not fit the model
            raise CardError(card.path, f"warm-up on blank lines failed ({type(e).__name__}: {first_line(e)}); "
                                       "check the card's [input] table and tensor names against the model") from e
    return rec
