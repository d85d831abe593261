"""The backend interface every measurement path implements.

A backend plays a stimulus into the device under test and captures what comes back.
Signals are float64 arrays in full-scale units (1.0 = 0 dBFS). The station enforces its
maximum output level before calling `play_and_capture`; a backend checks it again
(`assert_level`) immediately before any sample leaves the harness.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

import numpy as np

from harness.errors import LevelLimitError


@dataclass
class Capture:
    """What one play-and-capture returns.

    Attributes
    ----------
    response : ndarray, shape (n,)
        The device output as captured, full-scale units.
    reference : ndarray, shape (n,) or None
        The stimulus taken back directly by a second input (same clock and stream as
        `response`), or None when the station has no reference channel.
    sample_rate_hz : float
        Capture sample rate (nominal; the capture clock may differ from the playback
        clock, see `harness.estimate`).
    metadata : dict
        Backend facts worth recording: instrument identities, stream flags
        (``overflow``, ``underflow``), ``dropouts`` detected by the backend, etc.
    """

    response: np.ndarray
    reference: np.ndarray | None
    sample_rate_hz: float
    metadata: dict = field(default_factory=dict)


@runtime_checkable
class Backend(Protocol):
    """Minimal interface of a measurement path."""

    sample_rate_hz: float
    has_reference: bool

    def identity(self) -> dict:
        """Identities of the instruments / device in the path (for certificates)."""

    def play_and_capture(self, stimulus: np.ndarray, *, extra_samples: int = 0) -> Capture:
        """Play `stimulus` (full-scale units) and capture ``len(stimulus) + extra_samples``
        samples of the response (and the reference when present), on one clock."""

    def close(self) -> None:
        """Release the hardware."""


def peak_dbfs(signal: np.ndarray) -> float:
    """Peak level of a full-scale signal in dBFS (-inf for silence)."""
    peak = float(np.max(np.abs(signal))) if np.size(signal) else 0.0
    return -np.inf if peak == 0 else 20.0 * np.log10(peak)


def assert_level(signal: np.ndarray, max_output_dbfs: float, who: str = "station") -> None:
    """Refuse a signal whose peak exceeds `max_output_dbfs` (raises LevelLimitError)."""
    peak = peak_dbfs(signal)
    if peak > max_output_dbfs + 1e-9:
        raise LevelLimitError(
            f"refused: stimulus peak {peak:.2f} dBFS exceeds the {who}'s maximum output level "
            f"{max_output_dbfs:.2f} dBFS; nothing was played (lower [stimulus].level_dbfs or "
            f"raise [station].max_output_dbfs only if the hardware and the people near it allow)")
