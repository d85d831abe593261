"""The tolerance-mask model (harness.mask): limit lines, margins, overlapping bands,
transition bands, per-band worst points, relative gains and phase rules.

Every expected number is computed in the test from a closed form that does not use the
mask code: linear interpolation in dB over log10-frequency written out by hand, the
textbook least-squares projection of a quadratic onto a straight line, the phase of a
pure delay exp(-j 2 pi f tau), and scipy.signal.group_delay as the reference for the
group delay of a digital filter.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import signal

from harness.mask import Band, LimitLine, Mask, PhaseRule, group_delay_fd, margin


def db(x):
    return 20.0 * np.log10(np.abs(x))


# --------------------------------------------------------------------------------------
# limit lines
# --------------------------------------------------------------------------------------
def test_limit_line_interpolates_linearly_in_db_over_log_frequency():
    line = LimitLine((100.0, 1000.0), (0.0, -20.0))
    # geometric midpoint of 100 and 1000 Hz is sqrt(1e5) Hz: exactly half way in dB
    assert line.at(math.sqrt(1e5))[0] == pytest.approx(-10.0, abs=1e-12)
    # 200 Hz lies lg(2) = 0.30103 decades above 100 Hz: -20 dB/decade * 0.30103
    assert line.at(200.0)[0] == pytest.approx(-20.0 * math.log10(2.0), abs=1e-12)
    # not linear in Hz: interpolation over linear frequency would give -2.222 dB at 200 Hz
    assert line.at(200.0)[0] != pytest.approx(float(np.interp(200.0, [100, 1000], [0, -20])), abs=0.1)


def test_limit_line_many_points_hand_formula():
    f_pts = (31.5, 63.0, 125.0, 1000.0, 8000.0)
    v_pts = (-39.4, -26.2, -16.1, 0.0, -1.1)
    line = LimitLine(f_pts, v_pts)
    rng = np.random.default_rng(1)
    f = np.exp(rng.uniform(math.log(31.5), math.log(8000.0), 200))
    expect = []
    for fi in f:
        i = max(j for j in range(len(f_pts) - 1) if f_pts[j] <= fi)
        t = (math.log10(fi) - math.log10(f_pts[i])) / (math.log10(f_pts[i + 1]) - math.log10(f_pts[i]))
        expect.append(v_pts[i] + t * (v_pts[i + 1] - v_pts[i]))
    np.testing.assert_allclose(line.at(f), expect, rtol=0, atol=1e-11)
    # exactly at the break points the line takes the listed values
    np.testing.assert_allclose(line.at(np.array(f_pts)), v_pts, rtol=0, atol=1e-12)


def test_limit_line_is_undefined_outside_its_points():
    line = LimitLine((100.0, 1000.0), (0.0, -20.0))
    out = line.at([50.0, 99.999, 100.0, 1000.0, 1000.001, 0.0])
    assert np.isnan(out[[0, 1, 4, 5]]).all()
    assert out[2] == 0.0 and out[3] == -20.0


def test_limit_line_step_takes_the_later_value_from_the_step_on():
    # two equal frequencies make a step (mask.py convention)
    line = LimitLine((100.0, 1000.0, 1000.0, 10000.0), (0.0, 0.0, -10.0, -10.0))
    vals = line.at([999.999, 1000.0, 1000.001, 5000.0])
    np.testing.assert_allclose(vals, [0.0, -10.0, -10.0, -10.0])
    # a step at the very end and at the very start
    end = LimitLine((100.0, 1000.0, 1000.0), (0.0, 0.0, -10.0))
    np.testing.assert_allclose(end.at([500.0, 1000.0]), [0.0, -10.0])
    start = LimitLine((100.0, 100.0, 1000.0), (5.0, 0.0, 0.0))
    np.testing.assert_allclose(start.at([100.0, 200.0]), [0.0, 0.0])


def test_single_point_line_applies_at_that_frequency_only():
    line = LimitLine((1000.0,), (3.0,))
    out = line.at([999.0, 1000.0, 1001.0])
    assert np.isnan(out[0]) and out[1] == 3.0 and np.isnan(out[2])


@pytest.mark.parametrize("freqs, values", [((100.0, 50.0), (0.0, 1.0)), ((0.0, 10.0), (0.0, 0.0)),
                                           ((-1.0, 10.0), (0.0, 0.0)), ((), ()), ((1.0, 2.0), (0.0,))])
def test_limit_line_rejects_bad_points(freqs, values):
    with pytest.raises(ValueError):
        LimitLine(freqs, values)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(0.0, 5.0), st.floats(-100.0, 100.0)), min_size=2, max_size=8),
       st.floats(0.0, 1.0))
def test_limit_line_stays_between_neighbouring_points(points, where):
    pts = sorted(points)
    f = tuple(10.0 ** p for p, _ in pts)
    v = tuple(val for _, val in pts)
    line = LimitLine(f, v)
    x = math.log10(f[0]) + where * (math.log10(f[-1]) - math.log10(f[0]))
    fx = 10.0 ** x
    assume(f[0] <= fx <= f[-1])
    val = line.at(fx)[0]
    i = int(np.searchsorted(np.log10(f), math.log10(fx), side="right")) - 1
    i = min(max(i, 0), len(f) - 2)
    lo, hi = min(v[i], v[i + 1]), max(v[i], v[i + 1])
    if fx == f[-1]:
        lo, hi = min(lo, v[-1]), max(hi, v[-1])
    assert lo - 1e-9 <= val <= hi + 1e-9


# --------------------------------------------------------------------------------------
# margins
# --------------------------------------------------------------------------------------
def test_margin_sign_and_value():
    inf = np.inf
    g = np.array([0.3, 0.7, -0.6, -70.0, -50.0, 12.0])
    lo = np.array([-0.5, -0.5, -0.5, -inf, -inf, -inf])
    hi = np.array([0.5, 0.5, 0.5, -60.0, -60.0, inf])
    m = margin(g, lo, hi)
    np.testing.assert_allclose(m[:5], [0.2, -0.2, -0.1, 10.0, -10.0], atol=1e-12)
    assert np.isnan(m[5])          # no limit at all: no margin


def test_margin_of_zero_gain_under_a_floor_is_minus_infinity():
    with np.errstate(divide="ignore"):
        g = db(np.array([0.0]))
    assert margin(g, np.array([-1.0]), np.array([1.0]))[0] == -np.inf
    # under a ceiling only, silence is perfectly fine
    assert margin(g, np.array([-np.inf]), np.array([-60.0]))[0] == np.inf


def test_margin_of_undefined_gain_under_a_limit_is_never_inside():
    m = margin(np.array([np.nan, np.nan]), np.array([-1.0, -np.inf]), np.array([1.0, np.inf]))
    assert m[0] == -np.inf         # limited: counts as outside
    assert np.isnan(m[1])          # no limit: still no margin


finite = st.floats(-200.0, 200.0)


@settings(max_examples=200, deadline=None)
@given(finite, st.one_of(finite, st.just(-np.inf)), st.one_of(finite, st.just(np.inf)))
def test_margin_non_negative_iff_inside(g, lo, hi):
    assume(lo <= hi)
    assume(np.isfinite(lo) or np.isfinite(hi))
    m = float(margin(np.array([g]), np.array([lo]), np.array([hi]))[0])
    assert (m >= 0) == (lo <= g <= hi)
    # and the margin is the distance to the nearest limit
    d = min(hi - g if np.isfinite(hi) else np.inf, g - lo if np.isfinite(lo) else np.inf)
    assert m == pytest.approx(d, abs=1e-12)


# --------------------------------------------------------------------------------------
# bands, overlaps, transitions
# --------------------------------------------------------------------------------------
def test_band_edges_are_closed():
    band = Band("stop", 1000.0, 2000.0, max_db=-40.0)
    np.testing.assert_array_equal(band.covers([999.9, 1000.0, 2000.0, 2000.1]), [False, True, True, False])


@pytest.mark.parametrize("kind, start, stop", [("pass", 100.0, 100.0), ("pass", 200.0, 100.0),
                                               ("pass", -1.0, 100.0), ("notch", 1.0, 2.0)])
def test_band_rejects_bad_construction(kind, start, stop):
    with pytest.raises(ValueError):
        Band(kind, start, stop, min_db=-1.0, max_db=1.0)


def test_tightest_limit_wins_where_bands_overlap():
    mask = Mask((Band("pass", 10.0, 1000.0, min_db=-1.0, max_db=1.0),
                 Band("limits", 100.0, 200.0, upper=LimitLine((100.0, 200.0), (0.5, 0.5)),
                      lower=LimitLine((100.0, 200.0), (-3.0, -3.0))),
                 Band("stop", 150.0, 160.0, max_db=-0.2)))
    lo, hi = mask.limits([50.0, 120.0, 155.0, 500.0])
    np.testing.assert_allclose(lo, [-1.0, -1.0, -1.0, -1.0])     # pass floor beats -3
    np.testing.assert_allclose(hi, [1.0, 0.5, -0.2, 1.0])        # lowest ceiling wins
    res = mask.evaluate(np.array([50.0, 120.0, 155.0, 500.0]), gain_from_db([0.0, 0.7, 0.0, 0.0]))
    np.testing.assert_allclose(res.margin_db, [1.0, -0.2, -0.2, 1.0], atol=1e-12)
    assert not res.passed


def gain_from_db(x):
    return 10.0 ** (np.asarray(x, dtype=float) / 20.0)


def two_band_mask(**kw):
    return Mask((Band("pass", 10.0, 100.0, min_db=-1.0, max_db=1.0, label="pb"),
                 Band("stop", 1000.0, 10000.0, max_db=-40.0, label="sb")), **kw)


def test_transition_band_is_free():
    f = np.array([20.0, 50.0, 300.0, 2000.0])
    h = gain_from_db([0.0, 0.0, 20.0, -50.0])        # +20 dB bump in the transition band
    res = two_band_mask().evaluate(f, h)
    assert np.isnan(res.margin_db[2])
    assert res.passed
    assert [b.label for b in res.bands] == ["pb", "sb"]


def test_transition_ceiling_caps_the_transition_band():
    f = np.array([20.0, 50.0, 300.0, 2000.0])
    h = gain_from_db([0.0, 0.0, 20.0, -50.0])
    res = two_band_mask(transition_max_db=3.0).evaluate(f, h)
    assert res.margin_db[2] == pytest.approx(3.0 - 20.0)
    assert not res.passed
    trans = [b for b in res.bands if b.index == -1]
    assert len(trans) == 1 and trans[0].kind == "transition"
    assert trans[0].worst_freq_hz == 300.0 and trans[0].worst_margin_db == pytest.approx(-17.0)
    assert not trans[0].passed
    # the ceiling applies only where no band does: the pass band keeps its own +1 dB
    lo, hi = two_band_mask(transition_max_db=3.0).limits(f)
    np.testing.assert_allclose(hi, [1.0, 1.0, 3.0, -40.0])
    # and a bump below the ceiling passes
    h2 = gain_from_db([0.0, 0.0, 2.0, -50.0])
    assert two_band_mask(transition_max_db=3.0).evaluate(f, h2).passed


def test_per_band_worst_point():
    f = np.geomspace(10.0, 10000.0, 61)
    g = np.zeros_like(f)
    g[f >= 1000] = -45.0
    i_pb = 7                      # one dip in the pass band
    g[i_pb] = -0.9
    i_sb = int(np.argmin(np.abs(f - 3162.0)))
    g[i_sb] = -41.5               # the stop band's closest approach
    g[(f > 100) & (f < 1000)] = 30.0   # transition: ignored
    res = two_band_mask().evaluate(f, gain_from_db(g))
    pb, sb = res.bands
    assert pb.n_points == int(np.count_nonzero((f >= 10) & (f <= 100)))
    assert pb.worst_freq_hz == f[i_pb] and pb.worst_margin_db == pytest.approx(0.1)
    assert pb.worst_gain_db == pytest.approx(-0.9)
    assert sb.worst_freq_hz == f[i_sb] and sb.worst_margin_db == pytest.approx(1.5)
    assert res.passed
    assert res.worst_index == i_pb and res.worst_margin_db == pytest.approx(0.1)


def test_band_with_no_points_reports_none():
    res = two_band_mask().evaluate(np.array([20.0, 50.0]), np.ones(2))
    sb = res.bands[1]
    assert sb.n_points == 0 and math.isnan(sb.worst_margin_db) and sb.passed


def test_dead_unit_fails_instead_of_passing():
    # zero output in a pass band: gain -inf dB, margin -inf; the mask must fail
    # (regression: points with margin -inf used to be skipped and the unit passed)
    f = np.geomspace(10.0, 100.0, 5)
    with np.errstate(divide="ignore"):
        res = two_band_mask().evaluate(f, np.zeros(5))
    assert not res.gain_passed and not res.passed
    assert res.worst_margin_db == -np.inf and res.worst_index is not None
    assert not res.bands[0].passed


def test_dead_unit_fails_a_relative_mask_too():
    # relative to a dead reference every gain is 0/0 (NaN): still a fail, never a pass
    mask = two_band_mask(reference_hz=50.0)
    f = np.geomspace(10.0, 100.0, 5)
    with np.errstate(divide="ignore", invalid="ignore"):
        res = mask.evaluate(f, np.zeros(5))
    assert not res.passed
    assert not res.bands[0].passed


def test_evaluate_checks_shapes():
    with pytest.raises(ValueError):
        two_band_mask().evaluate(np.array([1.0, 2.0]), np.ones(3))
    with pytest.raises(ValueError):
        two_band_mask().evaluate(np.ones((2, 2)), np.ones((2, 2)))


# --------------------------------------------------------------------------------------
# relative to a reference frequency
# --------------------------------------------------------------------------------------
def test_gains_relative_to_reference():
    f = np.array([10.0, 50.0, 100.0, 2000.0])
    h = 7.3 * gain_from_db([0.5, 0.0, -0.5, -45.0])     # 17.27 dB of absolute gain
    rel = two_band_mask(reference_hz=50.0).evaluate(f, h)
    absolute = two_band_mask().evaluate(f, h)
    assert rel.reference_gain_db == pytest.approx(20 * math.log10(7.3))
    np.testing.assert_allclose(rel.gain_db, [0.5, 0.0, -0.5, -45.0], atol=1e-12)
    assert rel.passed and not absolute.passed
    np.testing.assert_allclose(absolute.gain_db - rel.gain_db, 20 * math.log10(7.3), atol=1e-12)


def test_reference_between_points_is_interpolated_in_db_over_log_frequency():
    mask = two_band_mask(reference_hz=40.0)
    f = np.array([20.0, 80.0])
    h = gain_from_db([2.0, 4.0])
    # 40 Hz is half way between 20 and 80 Hz on a log axis: 3 dB
    assert mask.reference_gain_db(f, h) == pytest.approx(3.0, abs=1e-12)
    res = mask.evaluate(f, h)
    np.testing.assert_allclose(res.gain_db, [-1.0, 1.0], atol=1e-12)


def test_explicit_reference_response_wins():
    mask = two_band_mask(reference_hz=50.0)
    f = np.array([20.0, 50.0])
    res = mask.evaluate(f, np.array([2.0, 2.0]), reference_h=1.0 + 0j)
    np.testing.assert_allclose(res.gain_db, 20 * math.log10(2.0), atol=1e-12)


def test_reference_outside_the_points_is_an_error():
    with pytest.raises(ValueError):
        two_band_mask(reference_hz=5.0).evaluate(np.array([20.0, 50.0]), np.ones(2))


@settings(max_examples=200, deadline=None)
@given(st.floats(1e-4, 1e4), st.floats(-180.0, 180.0))
def test_relative_verdict_does_not_depend_on_absolute_gain(scale, phase_deg):
    f = np.geomspace(10.0, 10000.0, 40)
    z, p, k = signal.butter(4, 2 * np.pi * 300.0, analog=True, output="zpk")
    _, h = signal.freqs_zpk(z, p, k, 2 * np.pi * f)
    mask = two_band_mask(reference_hz=50.0)
    base = mask.evaluate(f, h)
    scaled = mask.evaluate(f, h * scale * np.exp(1j * np.radians(phase_deg)))
    np.testing.assert_allclose(scaled.margin_db, base.margin_db, atol=1e-9)
    assert scaled.passed == base.passed


# --------------------------------------------------------------------------------------
# phase rules
# --------------------------------------------------------------------------------------
def phase_mask(rule: PhaseRule, bands=None):
    bands = bands or (Band("pass", 100.0, 5000.0, min_db=-1.0, max_db=1.0),)
    return Mask(tuple(bands), phase=rule)


def test_pure_delay_passes_the_linear_rule_with_zero_deviation():
    tau = 0.3e-3
    f = np.linspace(100.0, 5000.0, 400)
    h = np.exp(-2j * np.pi * f * tau)            # pure delay: phase -2 pi f tau
    res = phase_mask(PhaseRule("linear", max_deviation_deg=0.5)).evaluate(f, h)
    assert res.phase.delay_s == pytest.approx(tau, rel=1e-9)
    assert np.max(np.abs(res.phase.deviation_deg)) < 1e-8
    assert res.phase.worst_margin_deg == pytest.approx(0.5, abs=1e-8)
    assert res.passed


def test_linear_rule_allows_one_offset_per_pass_band():
    # two pass bands, a common delay, a different constant phase in each band
    tau = 1e-4
    bands = (Band("pass", 100.0, 1000.0, min_db=-1.0, max_db=1.0),
             Band("pass", 3000.0, 8000.0, min_db=-1.0, max_db=1.0))
    f = np.concatenate([np.linspace(100.0, 1000.0, 50), np.linspace(3000.0, 8000.0, 80)])
    offset = np.where(f < 2000.0, 0.4, -2.5)
    h = np.exp(1j * (offset - 2 * np.pi * f * tau))
    res = phase_mask(PhaseRule("linear", max_deviation_deg=0.1), bands).evaluate(f, h)
    assert res.phase.delay_s == pytest.approx(tau, rel=1e-9)
    assert np.max(np.abs(res.phase.deviation_deg)) < 1e-7
    assert res.passed


def test_quadratic_phase_fails_the_linear_rule_by_the_computable_amount():
    # phase = -2 pi f tau + beta x^2, x = (f - f_c)/h in [-1, 1] on N equally spaced
    # points. The least-squares line through x^2 on a symmetric grid is its mean,
    # mean(x^2) = (N + 1) / (3 (N - 1)) (sum of squares of an arithmetic progression),
    # so the largest deviation is at the ends: beta * (1 - (N + 1) / (3 (N - 1))).
    n = 201
    f = np.linspace(100.0, 5000.0, n)
    fc, half = 2550.0, 2450.0
    x = (f - fc) / half
    beta = np.radians(12.0)
    tau = 2e-4
    h = np.exp(1j * (-2 * np.pi * f * tau + beta * x**2))
    expected_dev_deg = np.degrees(beta) * (1.0 - (n + 1) / (3.0 * (n - 1)))   # 7.96 deg
    limit = 5.0
    res = phase_mask(PhaseRule("linear", max_deviation_deg=limit)).evaluate(f, h)
    assert np.max(np.abs(res.phase.deviation_deg)) == pytest.approx(expected_dev_deg, rel=1e-9)
    assert res.phase.worst_margin_deg == pytest.approx(limit - expected_dev_deg, rel=1e-9)
    assert res.phase.delay_s == pytest.approx(tau, rel=1e-9)   # the quadratic adds no slope
    assert not res.phase.passed and not res.passed
    assert res.gain_passed


def test_zero_phase_rule():
    f = np.linspace(100.0, 5000.0, 100)
    theta = np.radians(2.0) * np.sin(f / 300.0)
    rule = PhaseRule("zero", max_deviation_deg=3.0)
    res = phase_mask(rule).evaluate(f, np.exp(1j * theta))
    assert res.phase.worst_margin_deg == pytest.approx(3.0 - np.degrees(np.max(np.abs(theta))), abs=1e-9)
    assert res.passed
    # a pure delay is linear phase but not zero phase
    res = phase_mask(rule).evaluate(f, np.exp(-2j * np.pi * f * 1e-4))
    assert not res.passed


def test_phase_limits_rule_unwraps_from_the_lowest_frequency():
    # pure delay of 0.5 ms: phase -180 deg at 1 kHz, -360 deg at 2 kHz, -720 deg at 4 kHz
    tau = 0.5e-3
    f = np.geomspace(200.0, 4000.0, 300)
    expected = -360.0 * f * tau
    upper = LimitLine((200.0, 4000.0), (-360.0 * 200 * tau + 10, -360.0 * 4000 * tau + 10))
    lower = LimitLine((200.0, 4000.0), (-360.0 * 200 * tau - 10, -360.0 * 4000 * tau - 10))
    mask = phase_mask(PhaseRule("limits", upper=upper, lower=lower),
                      (Band("pass", 100.0, 5000.0, min_db=-1.0, max_db=1.0),))
    res = mask.evaluate(f, np.exp(-2j * np.pi * f * tau))
    np.testing.assert_allclose(res.phase.phase_deg, expected, atol=1e-9)
    # margin to straight lines in degrees over log-frequency, computed by hand
    t = (np.log10(f) - np.log10(200.0)) / (np.log10(4000.0) - np.log10(200.0))
    up = (-36.0 + 10) + t * ((-720.0 + 10) - (-36.0 + 10))
    lo = (-36.0 - 10) + t * ((-720.0 - 10) - (-36.0 - 10))
    np.testing.assert_allclose(res.phase.margin_deg, np.minimum(up - expected, expected - lo), atol=1e-9)
    # the delay's phase is straight in f, the lines are straight in log f: in between,
    # -360 f tau (concave over log f) bulges above the chord and crosses the upper line
    assert np.min(up - expected) < 0 and np.min(expected - lo) > 0
    assert np.min(res.phase.margin_deg) < 0 and not res.passed


def test_phase_limits_rule_with_inverted_polarity():
    f = np.geomspace(1000.0, 4000.0, 50)
    rule = PhaseRule("limits", upper=LimitLine((1000.0, 4000.0), (10.0, 10.0)),
                     lower=LimitLine((1000.0, 4000.0), (-10.0, -10.0)))
    mask = phase_mask(rule)
    assert mask.evaluate(f, np.full(f.shape, 1.0 + 0j)).passed
    res = mask.evaluate(f, np.full(f.shape, -1.0 + 0j))    # 180 deg
    assert res.phase.worst_margin_deg == pytest.approx(10.0 - 180.0)
    assert not res.passed


def test_group_delay_limit_with_a_pure_delay():
    tau = 1e-3
    f = np.linspace(100.0, 5000.0, 500)
    h = np.exp(-2j * np.pi * f * tau)
    res = phase_mask(PhaseRule("none", max_group_delay_s=0.5e-3)).evaluate(f, h)
    np.testing.assert_allclose(res.phase.group_delay_s, tau, rtol=1e-9)
    np.testing.assert_allclose(res.phase.group_delay_margin_s, -0.5e-3, rtol=1e-6)
    assert not res.passed
    res = phase_mask(PhaseRule("none", max_group_delay_s=2e-3)).evaluate(f, h)
    assert res.passed
    np.testing.assert_allclose(res.phase.group_delay_margin_s, 1e-3, rtol=1e-6)


def test_given_group_delay_is_used_as_is():
    f = np.linspace(100.0, 5000.0, 50)
    gd = np.full(f.shape, 3e-3)
    res = phase_mask(PhaseRule("none", max_group_delay_s=1e-3)).evaluate(f, np.ones(50), group_delay_s=gd)
    np.testing.assert_allclose(res.phase.group_delay_s, 3e-3)
    assert not res.passed


def test_group_delay_estimate_matches_scipy_for_a_digital_filter():
    # reference: scipy.signal.group_delay (samples) / fs
    fs = 48000.0
    b, a = signal.ellip(6, 0.2, 60, 10000.0, fs=fs)
    f = np.linspace(50.0, 9000.0, 4000)
    _, h = signal.freqz(b, a, worN=f, fs=fs)
    _, gd_samples = signal.group_delay((b, a), w=f, fs=fs)
    ref_s = gd_samples / fs
    est = group_delay_fd(f, np.unwrap(np.angle(h)))
    np.testing.assert_allclose(est[1:-1], ref_s[1:-1], rtol=2e-3, atol=1e-7)
    limit = float(np.max(ref_s)) * 1.01
    mask = phase_mask(PhaseRule("none", max_group_delay_s=limit), (Band("pass", 50.0, 9000.0, min_db=-1, max_db=1),))
    assert mask.evaluate(f, h).phase.passed
    mask = phase_mask(PhaseRule("none", max_group_delay_s=float(np.max(ref_s)) * 0.95),
                      (Band("pass", 50.0, 9000.0, min_db=-1, max_db=1),))
    assert not mask.evaluate(f, h).phase.passed


def test_undefined_phase_fails_the_linear_rule():
    # regression: NaN deviations used to be skipped and the rule passed
    f = np.linspace(100.0, 5000.0, 50)
    h = np.exp(-2j * np.pi * f * 1e-4)
    h[10] = np.nan
    res = phase_mask(PhaseRule("linear", max_deviation_deg=5.0)).evaluate(f, h)
    assert not res.phase.passed and not res.passed


def test_no_phase_rule_means_no_phase_result():
    res = two_band_mask().evaluate(np.array([20.0, 50.0]), np.ones(2))
    assert res.phase is None


def test_edges_hz_collects_band_edges_and_line_points():
    mask = Mask((Band("pass", 10.0, 100.0, min_db=-1.0, max_db=1.0),
                 Band("limits", 200.0, 400.0, upper=LimitLine((200.0, 300.0, 400.0), (0.0, -5.0, -10.0)))),
                reference_hz=50.0, phase=PhaseRule("limits", upper=LimitLine((20.0, 80.0), (0.0, 0.0))))
    np.testing.assert_allclose(mask.edges_hz(), [10.0, 20.0, 50.0, 80.0, 100.0, 200.0, 300.0, 400.0])
    assert mask.f_min_hz == 10.0 and mask.f_max_hz == 400.0
