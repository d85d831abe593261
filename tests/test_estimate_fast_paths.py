"""Tests of the shortcuts inside harness.estimate that keep the multitone analysis fast:
the folded correlation of a periodic stimulus, resampling several channels with shared
chirps, and the clipping checks without full-length temporaries.

Each shortcut is compared with the plain computation it replaces, done here with
scipy/numpy: `scipy.signal.correlate` of the capture with the whole tiled stimulus,
`scipy.signal.resample` (the periodic band-limited interpolant, as in
tests/test_estimate.py), and the smallest non-zero sample step by `numpy.diff`.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal as ss

from harness.errors import InvalidMeasurement
from harness.estimate import (
    _check_clipping,
    _check_flat_tops,
    _min_step,
    _resample_spectra,
    _start,
    _xcorr,
    resample_by_ratio,
)


def _reference_xcorr(x, s, lo, hi):
    """sum_n s[n] x[n + l] for lo <= l <= hi, x zero outside its samples
    (scipy.signal.correlate over an explicitly zero-padded capture)."""
    pad_lo, pad_hi = max(0, -lo), max(0, hi + s.size - x.size)
    xp = np.concatenate([np.zeros(pad_lo), x, np.zeros(pad_hi)])
    seg = xp[lo + pad_lo: hi + pad_lo + s.size]
    return ss.correlate(seg, s, mode="valid", method="direct")


@pytest.mark.parametrize("lo, hi", [(0, 300), (-50, 40), (900, 1500), (2500, 2600)])
def test_folded_correlation_equals_correlation_with_the_tiled_stimulus(lo, hi):
    rng = np.random.default_rng(3)
    period = rng.standard_normal(256)
    reps = 7
    x = np.concatenate([np.zeros(300), np.tile(period, reps), np.zeros(200)])
    x += 1e-3 * rng.standard_normal(x.size)
    ref = _reference_xcorr(x, np.tile(period, reps), lo, hi)
    got = _xcorr(x, period, lo, hi, reps)
    plain = _xcorr(x, np.tile(period, reps), lo, hi)             # the chunked path
    scale = np.max(np.abs(ref))
    assert got.shape == ref.shape == plain.shape
    assert np.max(np.abs(got - ref)) <= 1e-12 * scale
    assert np.max(np.abs(plain - ref)) <= 1e-12 * scale


@pytest.mark.parametrize("extra, cut", [(400, 0), (400, 400)])
def test_start_of_a_periodic_stimulus_same_with_folding(extra, cut):
    # a latency beyond the extra samples (cut > 0) must still show as a late start: here
    # 2922 of the 3072 stimulus samples are captured; a start one period earlier fits in
    # the capture but overlaps only 2560 of them (5 % or more less)
    rng = np.random.default_rng(5)
    period = rng.standard_normal(512)
    reps = 6
    s = np.tile(period, reps)
    lag = 150 + cut
    x = np.zeros(s.size + extra)
    n = min(s.size, x.size - lag)
    x[lag:lag + n] = -0.5 * s[:n]                                # an inverting device
    x += 1e-3 * rng.standard_normal(x.size)
    folded = _start(x, period, reps)
    assert folded == _start(x, s)
    if cut:
        assert folded[1] == lag
    else:
        assert folded == (lag, None)


def test_resampling_channels_together_equals_one_at_a_time():
    # and both equal scipy.signal.resample at a ratio it can realise (L / num)
    rng = np.random.default_rng(7)
    L, num = 6000, 6003
    xs = []
    for _ in range(2):
        x = np.zeros(L)
        x[500:5500] = rng.standard_normal(5000)
        xs.append(x)
    together = _resample_spectra([np.fft.rfft(x) for x in xs], L, L / num, num)
    for x, y in zip(xs, together):
        assert np.max(np.abs(y - resample_by_ratio(x, L / num, n_out=num))) < 1e-12
        assert np.max(np.abs(y - ss.resample(x, num))) < 1e-9


def test_min_step_is_the_smallest_nonzero_sample_step():
    rng = np.random.default_rng(9)
    x = np.round(rng.standard_normal(200_001) * 300) / 2 ** 15     # 16-bit-like steps
    d = np.abs(np.diff(x))
    assert _min_step(x, chunk=4096) == np.min(d[d > 0])
    assert _min_step(np.full(100, 0.25)) == 0.0
    assert _min_step(np.zeros(1)) == 0.0


def test_clipping_checks_still_find_flat_tops():
    # a sine clipped at 0.5 FS, with and without noise on top (common practice: a held
    # level entered by steep steps is the mark of a limiter)
    n = np.arange(48000)
    x = np.clip(0.8 * np.sin(2 * np.pi * 997 * n / 48000), -0.5, 0.5)
    with pytest.raises(InvalidMeasurement, match="clipping.*flat tops"):
        _check_clipping(x, "response", -0.1)
    noisy = x + 1e-5 * np.random.default_rng(1).standard_normal(x.size)
    _check_clipping(noisy, "response", -0.1)                     # no equal samples: not seen here
    with pytest.raises(InvalidMeasurement, match="clipping.*flat tops"):
        _check_flat_tops(noisy, 1e-5, "response")
    clean = 0.8 * np.sin(2 * np.pi * 997 * n / 48000) + 1e-5 * np.random.default_rng(2).standard_normal(n.size)
    _check_flat_tops(clean, 1e-5, "response")
    _check_clipping(clean, "response", -0.1)
