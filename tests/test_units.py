"""Unit conversions (harness.units) against closed forms.

Sources for the check values:
* Amplitude decibels: 20 lg(|H|) (textbook definition; e.g. Oppenheim & Schafer,
  Discrete-Time Signal Processing, magnitude response in dB).
* Ripple form of a low-pass specification, 1 - delta_2 <= |H| <= 1 + delta_1 in the
  pass band and |H| <= delta_s in the stop band, converted with the same 20 lg
  (textbook; the tolerance scheme of Oppenheim & Schafer ch. 7).
* Digital frequency omega = 2 pi f / fs rad/sample, Nyquist f = fs/2 = pi rad/sample
  (textbook sampling theorem).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from harness.units import (
    db_from_gain,
    gain_from_db,
    hz_from_nyquist,
    hz_from_rad,
    passband_db_from_ripple,
    rad_from_hz,
    stopband_db_from_ripple,
    wrap_deg,
)


# --------------------------------------------------------------------------------------
# decibels
# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("gain, db", [
    (1.0, 0.0),            # definition
    (10.0, 20.0),          # 20 lg 10
    (0.1, -20.0),
    (1000.0, 60.0),
    (0.001, -60.0),
    (2.0, 6.020599913279624),   # 20 lg 2 (textbook "6 dB per doubling", exact value)
    (math.sqrt(0.5), -3.010299956639812),  # half power: 10 lg 2
])
def test_db_from_gain_known_values(gain, db):
    assert float(db_from_gain(gain)) == pytest.approx(db, abs=1e-12)
    assert float(gain_from_db(db)) == pytest.approx(gain, rel=1e-12)


def test_db_from_gain_of_zero_is_minus_infinity():
    with np.errstate(divide="ignore"):
        assert float(db_from_gain(0.0)) == -np.inf


def test_db_conversions_work_on_arrays():
    g = np.array([0.5, 1.0, 2.0])
    np.testing.assert_allclose(db_from_gain(g), 20 * np.log10(g), rtol=0, atol=1e-15)
    np.testing.assert_allclose(gain_from_db([-6.0, 0.0, 6.0]), 10 ** (np.array([-6.0, 0.0, 6.0]) / 20))


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=1e-12, max_value=1e12))
def test_gain_db_round_trip(gain):
    assert float(gain_from_db(db_from_gain(gain))) == pytest.approx(gain, rel=1e-12)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=-240.0, max_value=240.0))
def test_db_gain_round_trip(db):
    assert float(db_from_gain(gain_from_db(db))) == pytest.approx(db, abs=1e-11)


# --------------------------------------------------------------------------------------
# ripple form
# --------------------------------------------------------------------------------------
def test_passband_ripple_one_percent():
    # delta_1 = delta_2 = 0.01: 20 lg 1.01 = +0.0864 dB, 20 lg 0.99 = -0.0873 dB (textbook 20 lg)
    lo, hi = passband_db_from_ripple(0.01, 0.01)
    assert round(hi, 4) == 0.0864
    assert round(lo, 4) == -0.0873
    assert hi == pytest.approx(20 * math.log10(1.01), abs=1e-14)
    assert lo == pytest.approx(20 * math.log10(0.99), abs=1e-14)


def test_passband_ripple_is_asymmetric_in_db():
    # equal linear ripple gives a deeper dip than peak in dB: |20 lg(1-d)| > 20 lg(1+d)
    lo, hi = passband_db_from_ripple(0.1, 0.1)
    assert -lo > hi
    assert hi == pytest.approx(0.8278537031645011, abs=1e-12)   # 20 lg 1.1
    assert lo == pytest.approx(-0.9151498112135022, abs=1e-12)  # 20 lg 0.9


@pytest.mark.parametrize("delta_s, db", [(0.001, -60.0), (0.01, -40.0), (1e-5, -100.0), (0.5, -6.020599913279624)])
def test_stopband_ripple(delta_s, db):
    # delta_s = 0.001 -> -60 dB (textbook 20 lg)
    assert stopband_db_from_ripple(delta_s) == pytest.approx(db, abs=1e-12)


@pytest.mark.parametrize("d1, d2", [(-0.01, 0.01), (0.01, 1.0), (0.01, -0.1), (0.01, 1.5)])
def test_passband_ripple_rejects_impossible_values(d1, d2):
    with pytest.raises(ValueError):
        passband_db_from_ripple(d1, d2)


@pytest.mark.parametrize("ds", [0.0, -0.001])
def test_stopband_ripple_rejects_non_positive(ds):
    with pytest.raises(ValueError):
        stopband_db_from_ripple(ds)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=0.0, max_value=10.0), st.floats(min_value=0.0, max_value=0.999999))
def test_passband_ripple_window_contains_unity(d1, d2):
    lo, hi = passband_db_from_ripple(d1, d2)
    assert lo <= 0.0 <= hi
    assert float(gain_from_db(hi)) == pytest.approx(1.0 + d1, rel=1e-12)
    assert float(gain_from_db(lo)) == pytest.approx(1.0 - d2, rel=1e-9, abs=1e-12)


# --------------------------------------------------------------------------------------
# frequency mapping omega = 2 pi f / fs
# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("fs", [8000.0, 44100.0, 48000.0, 96000.0, 192000.0])
def test_nyquist_is_pi_rad_per_sample(fs):
    assert float(rad_from_hz(fs / 2, fs)) == pytest.approx(math.pi, rel=1e-15)
    assert float(hz_from_rad(math.pi, fs)) == pytest.approx(fs / 2, rel=1e-15)
    assert float(hz_from_nyquist(1.0, fs)) == fs / 2
    assert float(rad_from_hz(0.0, fs)) == 0.0


def test_known_digital_frequencies():
    # 1 kHz at 48 kS/s: 2 pi / 48 rad/sample
    assert float(rad_from_hz(1000.0, 48000.0)) == pytest.approx(2 * math.pi / 48, rel=1e-15)
    # fs/4 is pi/2
    assert float(rad_from_hz(12000.0, 48000.0)) == pytest.approx(math.pi / 2, rel=1e-15)
    # half of Nyquist at 44.1 kS/s is 11025 Hz
    assert float(hz_from_nyquist(0.5, 44100.0)) == 11025.0
    # 0.9 pi rad/sample at 48 kS/s is 21.6 kHz
    assert float(hz_from_rad(0.9 * math.pi, 48000.0)) == pytest.approx(21600.0, rel=1e-14)


def test_frequency_mapping_on_arrays():
    f = np.array([0.0, 6000.0, 12000.0, 24000.0])
    np.testing.assert_allclose(rad_from_hz(f, 48000.0), [0.0, math.pi / 4, math.pi / 2, math.pi], rtol=1e-15)
    np.testing.assert_allclose(hz_from_nyquist([0.0, 0.25, 1.0], 48000.0), [0.0, 6000.0, 24000.0])


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=0.0, max_value=1.0), st.floats(min_value=1.0, max_value=1e7))
def test_nyquist_fraction_and_rad_agree(fraction, fs):
    # fraction nu of Nyquist is omega = nu * pi
    hz = float(hz_from_nyquist(fraction, fs))
    assert float(rad_from_hz(hz, fs)) == pytest.approx(fraction * math.pi, rel=1e-12, abs=1e-300)
    assert float(hz_from_rad(fraction * math.pi, fs)) == pytest.approx(hz, rel=1e-12, abs=1e-300)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=0.0, max_value=1e6), st.floats(min_value=1.0, max_value=1e7))
def test_hz_rad_round_trip(freq_hz, fs):
    assert float(hz_from_rad(rad_from_hz(freq_hz, fs), fs)) == pytest.approx(freq_hz, rel=1e-12, abs=1e-300)


# --------------------------------------------------------------------------------------
# phase wrapping to (-180, 180]
# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("deg, wrapped", [
    (0.0, 0.0), (90.0, 90.0), (179.0, 179.0), (180.0, 180.0), (-180.0, 180.0),
    (181.0, -179.0), (190.0, -170.0), (-190.0, 170.0), (359.0, -1.0), (360.0, 0.0),
    (540.0, 180.0), (-540.0, 180.0), (720.5, 0.5), (-3600.0 - 45.0, -45.0),
])
def test_wrap_deg_known_values(deg, wrapped):
    assert float(wrap_deg(deg)) == pytest.approx(wrapped, abs=1e-9)


def test_wrap_deg_on_arrays_keeps_shape():
    out = wrap_deg(np.array([[-180.0, 270.0], [450.0, -90.0]]))
    assert out.shape == (2, 2)
    np.testing.assert_allclose(out, [[180.0, -90.0], [90.0, -90.0]])


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=-1e6, max_value=1e6))
def test_wrap_deg_range_and_equivalence(deg):
    w = float(wrap_deg(deg))
    assert -180.0 < w <= 180.0
    turns = (deg - w) / 360.0
    assert turns == pytest.approx(round(turns), abs=1e-6)
