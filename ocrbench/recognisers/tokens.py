"""Token ids -> text and per-character confidences: a symbol table, or a ``tokenizer.json``.

A symbol table (one JSON string per token) maps each token to its text, so a
token's probability goes to each of its characters. A subword tokenizer
(``tokenizer.json``, read with the ``tokenizers`` library) must be decoded over
the whole sequence: in byte-level BPE a token may hold part of a character's
UTF-8 bytes (``£`` is two bytes, often two tokens), so joining token texts one by
one would write ``\\ufffd``. Per-character confidences are then mapped through the
bytes of each token: the sequence is decoded one token longer at a time, and the
characters a token adds or completes take its probability (a character made of
the bytes of several tokens takes the lowest of their probabilities).
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

from ocrbench.errors import CardError


class SymbolTable:
    """Token index -> text; special tokens decode to nothing."""

    def __init__(self, symbols: Sequence[str]):
        self.symbols = tuple(symbols)

    def __len__(self) -> int:
        return len(self.symbols)

    def decode(self, ids: Sequence[int], probs: Sequence[float]) -> tuple[str, list[float]]:
        text, chars = [], []
        for tok, p in zip(ids, probs):
            piece = self.symbols[tok] if 0 <= tok < len(self.symbols) else ""
            text.append(piece)
            chars += [float(p)] * len(piece)
        return "".join(text), chars

    def texts(self) -> list[str]:
        """Each token's text on its own (special tokens: empty)."""
        return list(self.symbols)


class TokenizerFile:
    """A ``tokenizer.json`` (Hugging Face ``tokenizers`` format), decoded over the whole sequence with its own
    decoder, special tokens skipped (as ``decode(ids, skip_special_tokens=True)`` does)."""

    def __init__(self, path: Path, card: Path):
        from tokenizers import Tokenizer

        try:
            self.tok = Tokenizer.from_file(str(path))
        except Exception as e:  # the Rust side raises a plain Exception with a parse message
            raise CardError(card, f"field 'seq.tokenizer': {path.name} is not a tokenizer file the tokenizers "
                                  f"library can read ({type(e).__name__})") from e
        self.size = self.tok.get_vocab_size(with_added_tokens=True)
        self.special = frozenset(i for i, t in self.tok.get_added_tokens_decoder().items() if t.special)

    def __len__(self) -> int:
        return self.size

    def token(self, i: int) -> str | None:
        return self.tok.id_to_token(i)

    def text(self, ids: Sequence[int]) -> str:
        return self.tok.decode([int(i) for i in ids], skip_special_tokens=True)

    def texts(self) -> list[str]:
        """Each token's text decoded on its own (special tokens: empty; a lone byte of a longer character
        decodes to U+FFFD)."""
        return self.tok.decode_batch([[i] for i in range(self.size)], skip_special_tokens=True)

    def decode(self, ids: Sequence[int], probs: Sequence[float]) -> tuple[str, list[float]]:
        ids = [int(i) for i in ids]
        chars: list[float] = []
        prev = ""
        for k, p in enumerate(probs[: len(ids)]):
            cur = self.text(ids[: k + 1])
            same = 0
            for a, b in zip(prev, cur):
                if a != b:
                    break
                same += 1
            rewritten = [min(c, float(p)) for c in chars[same: len(cur)]]
            chars = chars[:same] + rewritten + [float(p)] * (len(cur) - same - len(rewritten))
            prev = cur
        text = self.text(ids)
        return text, chars[: len(text)] + [1.0] * (len(text) - len(chars))
