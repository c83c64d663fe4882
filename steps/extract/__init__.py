"""The extract step as a package: the step's contract (step.py), the block helpers
(blocks.py), the registry from sniffed format to reader (registry.py) and one module
per format family. Importing the package gives the step; readers load on first use."""

from .step import EXTRACT, MB, PAYLOAD_KEYS, ExtractParams, extract

__all__ = ["EXTRACT", "MB", "PAYLOAD_KEYS", "ExtractParams", "extract"]
