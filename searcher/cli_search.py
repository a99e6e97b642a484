"""Command line for the search, report, export and status commands (filled in as they land)."""

from __future__ import annotations


def add_search_commands(sub, space_path, add_budget, budget) -> None:
    """Register the commands that work on a run folder."""
