"""ocrbench: measure, compare, plan and run OCR of a scanned archive on CPU."""

__version__ = "0.1.0"
