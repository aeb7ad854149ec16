"""CLI commands of the pipeline stages (ranging, columns, decoding, analysis), joined to ``app``."""

from __future__ import annotations

from .cli import app  # noqa: F401
