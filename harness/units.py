"""Unit conversions: gain (dB, linear, ripple form) and frequency (Hz, rad/sample,
fraction of Nyquist). Pure functions, exact closed forms.

The digital frequency mapping is ``omega = 2*pi*f/fs`` (rad/sample); Nyquist is
``omega = pi``, i.e. ``f = fs/2``; a fraction of Nyquist ``nu`` is ``f = nu*fs/2``.
"""

from __future__ import annotations

import numpy as np


def db_from_gain(gain):
    """Amplitude gain (linear, > 0) to decibels: ``20*log10(gain)``."""
    return 20.0 * np.log10(gain)


def gain_from_db(gain_db):
    """Decibels to amplitude gain: ``10**(gain_db/20)``."""
    return 10.0 ** (np.asarray(gain_db, dtype=float) / 20.0)


def passband_db_from_ripple(delta_1: float, delta_2: float) -> tuple[float, float]:
    """Pass-band window from the ripple form ``1 - delta_2 <= |H| <= 1 + delta_1``.

    Returns ``(min_db, max_db)`` = ``(20 log10(1 - delta_2), 20 log10(1 + delta_1))``.
    ``delta_2`` must be in [0, 1) and ``delta_1`` >= 0.
    """
    if not (0.0 <= delta_2 < 1.0):
        raise ValueError("delta_2 must be in [0, 1)")
    if delta_1 < 0.0:
        raise ValueError("delta_1 must be >= 0")
    return float(db_from_gain(1.0 - delta_2)), float(db_from_gain(1.0 + delta_1))


def stopband_db_from_ripple(delta_s: float) -> float:
    """Stop-band ceiling from the ripple form ``|H| <= delta_s``: ``20 log10(delta_s)``."""
    if not delta_s > 0.0:
        raise ValueError("delta_s must be > 0")
    return float(db_from_gain(delta_s))


def rad_from_hz(freq_hz, sample_rate_hz: float):
    """Frequency in Hz to digital frequency in rad/sample: ``2*pi*f/fs``."""
    return 2.0 * np.pi * np.asarray(freq_hz, dtype=float) / float(sample_rate_hz)


def hz_from_rad(omega_rad, sample_rate_hz: float):
    """Digital frequency in rad/sample to Hz: ``omega*fs/(2*pi)``."""
    return np.asarray(omega_rad, dtype=float) * float(sample_rate_hz) / (2.0 * np.pi)


def hz_from_nyquist(fraction, sample_rate_hz: float):
    """Fraction of Nyquist (1.0 = fs/2) to Hz."""
    return np.asarray(fraction, dtype=float) * float(sample_rate_hz) / 2.0


def wrap_deg(phase_deg):
    """Wrap phase in degrees to (-180, 180]."""
    p = np.mod(np.asarray(phase_deg, dtype=float) + 180.0, 360.0) - 180.0
    return np.where(p == -180.0, 180.0, p)
