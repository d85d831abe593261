"""Measurement verbs of the command line (run, demo, calibrate)."""

from __future__ import annotations


def register(sub) -> None:
    """Add the measurement verbs to the top-level subparsers."""
