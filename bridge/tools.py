"""Tool commands: check, watch, tape, replay, plot (see cli.py)."""

from __future__ import annotations

from typing import Any


def register(cli: Any, common: Any) -> None:
    """Add the tool commands to the parser."""
