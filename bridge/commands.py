"""Sub-commands that work with the profile store and a running daemon (see cli.py)."""

from __future__ import annotations

from typing import Any


def register(cli: Any) -> None:
    """Add the store and daemon commands to the parser."""
