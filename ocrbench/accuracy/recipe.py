"""Recipe strings: what produced a reported figure, so two figures can be compared.

A CER of 2.1 % under the ``exact`` profile and one of 1.4 % under ``ledger`` are
different measurements. Every figure ocrbench reports carries a recipe string:
``key=value`` fields separated by ``;`` in a fixed order, for example::

    metric=cer;unit=codepoint;profile=nfc.1;agg=corpus;pair=line-else-page;ci=xboot-pages/2000/95%/seed0;tool=ocrbench-0.1.0;rec=3f2a9c0d11e4

Fields:

``metric``   ``cer``, ``wer``, ``class-error/<class>``, ``class-insert/<class>``, ``amounts-right``
``unit``     ``codepoint`` (characters are Unicode code points after normalisation),
             ``word`` (``str.split`` tokens), ``amount``
``profile``  normalisation profile name and version (``nfc.1``)
``agg``      ``corpus`` (sum the counts over pages, then divide) or
             ``page-mean`` (mean of the per-page rates; pages with no reference
             text left out)
``pair``     how lines were paired: ``line-else-page`` (by index when both sides
             have the same number of lines, else the page aligned as one text)
``ci``       interval method: ``xboot-pages/<resamples>/<level>%/seed<seed>`` (expanded
             percentile bootstrap, pages resampled; see :mod:`ocrbench.accuracy.stats`)
             or ``none``
``tool``     ``ocrbench-<version>``
``rec``      the recogniser's hash (first 12 hex digits) or ``unknown``
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields, replace

from ocrbench import __version__

__all__ = ["Recipe", "differences"]

PAIRING = "line-else-page"


@dataclass(frozen=True)
class Recipe:
    """The fields of a recipe string (see the module docstring)."""

    metric: str
    unit: str
    profile: str
    agg: str = "corpus"
    pair: str = PAIRING
    ci: str = "none"
    tool: str = f"ocrbench-{__version__}"
    rec: str = "unknown"

    def __str__(self) -> str:
        return ";".join(f"{f.name}={getattr(self, f.name)}" for f in fields(self))

    def with_(self, **changes: str) -> "Recipe":
        """A copy with some fields changed."""
        return replace(self, **changes)

    @classmethod
    def parse(cls, text: str) -> "Recipe":
        """Read a recipe string back. Raises ValueError if a field is missing or unknown."""
        parts = {}
        for item in text.split(";"):
            key, sep, value = item.partition("=")
            if not sep:
                raise ValueError(f"recipe field without '=': {item!r}")
            parts[key] = value
        names = {f.name for f in fields(cls)}
        unknown = set(parts) - names
        missing = names - set(parts)
        if unknown or missing:
            raise ValueError(f"recipe {text!r}: unknown fields {sorted(unknown)}, missing {sorted(missing)}")
        return cls(**parts)

    def as_dict(self) -> dict[str, str]:
        return asdict(self)


def ci_tag(n_boot: int, level: float, seed: int) -> str:
    """The ``ci`` field for a page bootstrap."""
    return f"xboot-pages/{n_boot}/{level * 100:g}%/seed{seed}"


def rec_tag(recogniser_hash: str | None) -> str:
    """The ``rec`` field: the first 12 hex digits of the hash, or ``unknown``."""
    if not recogniser_hash:
        return "unknown"
    h = recogniser_hash.split(":", 1)[-1]
    return h[:12]


def differences(a: str | Recipe, b: str | Recipe, *, ignore: tuple[str, ...] = ("rec", "ci")) -> dict[str, tuple[str, str]]:
    """Fields in which two recipes differ (by default ignoring the recogniser and the interval).

    An empty result means the two figures were measured the same way and can be
    compared directly; comparing two recognisers is the usual reason ``rec`` differs.
    """
    ra = a if isinstance(a, Recipe) else Recipe.parse(a)
    rb = b if isinstance(b, Recipe) else Recipe.parse(b)
    return {f.name: (getattr(ra, f.name), getattr(rb, f.name))
            for f in fields(Recipe)
            if f.name not in ignore and getattr(ra, f.name) != getattr(rb, f.name)}
