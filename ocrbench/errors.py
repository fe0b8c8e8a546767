"""Typed errors. Library code raises these; only the CLI turns them into exit codes.

Every message names the file (or item) and says what is wrong in words a person
can act on.
"""

from __future__ import annotations

from pathlib import Path


class OcrbenchError(Exception):
    """Base class of every error ocrbench raises on purpose."""


class InputError(OcrbenchError):
    """A user-supplied file is unusable. ``path`` names it, ``reason`` says why."""

    def __init__(self, path: str | Path, reason: str):
        self.path = str(path)
        self.reason = reason
        super().__init__(f"{self.path}: {reason}")


class PageError(InputError):
    """A page image cannot be used (empty, truncated, not an image, unsupported)."""


class ImageTooLargeError(PageError):
    """A page declares a size beyond the configured pixel limit (decompression bomb guard)."""


class TextFileError(InputError):
    """A ground-truth or hypothesis text file cannot be read (encoding, missing)."""


class ConfigError(InputError):
    """A configuration table (card, plan file, post-processing recipe) has an unknown key,
    a value of the wrong type or out of range. The message names the key's dotted path."""


class CardError(ConfigError):
    """A recogniser card or one of its model files is invalid."""


class StoreError(OcrbenchError):
    """The run store cannot be opened or written (read-only path, full disk, wrong schema)."""


class PlanError(OcrbenchError):
    """A plan cannot be made from what was given (no calibration data, bad numbers)."""


class PostprocessError(OcrbenchError):
    """A post-processing pipeline cannot be built or applied (unknown step, bad option, missing word list)."""


class ClusterError(OcrbenchError):
    """The Dask cluster cannot be started or reached, or its workers cannot run the recognisers."""


class ReportError(OcrbenchError):
    """A report cannot be written (output folder not writable) or its inputs do not fit together."""
