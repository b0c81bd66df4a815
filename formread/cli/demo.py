"""Commands of the demo group (filled in by its issue)."""

from __future__ import annotations

import typer


def register(app: typer.Typer) -> None:
    """Add this group's commands to the main app."""
