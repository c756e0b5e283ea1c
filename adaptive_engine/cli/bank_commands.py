"""``adaptive-engine bank ...``: check a bank and print its information curves."""

from __future__ import annotations

import click

from ._common import main


@main.group()
def bank():
    """Check an item bank and inspect its information."""
