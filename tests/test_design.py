"""Tests for harness.design: coefficient files, the dense certified evaluation, fixed
point, and ``harness design-check`` end to end.

Outside references: scipy.signal (filter design, order estimation, responses, group
delay, computed independently of the code under test), the textbook Butterworth and
Chebyshev formulas of /work/shared/REFERENCES.md ("Filter textbook facts"), and the
bilinear-transform frequency warping ``Omega = tan(omega / 2)`` (textbook: Oppenheim &
Schafer, Discrete-Time Signal Processing, bilinear transformation section, from memory).
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
from scipy import signal

from harness.cli import main
from harness.design import (
    FilterDesign,
    QFormat,
    _ba_interval_bounds,
    _interval_bounds,
    evaluate_design,
    load_coefficients,
    parse_qformat,
    quantize_design,
    quantize_sos,
)
from harness.errors import ConfigError
from harness.mask import Band, LimitLine, Mask

FS = 48000.0
TEN_LOG_2 = 10.0 * math.log10(2.0)   # 3.0103 dB: Butterworth at the cutoff (REFERENCES.md)


# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------
def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


def write_json(tmp_path, name, obj):
    return write(tmp_path, name, json.dumps(obj))


def profile_text(bands: str, *, fs=48000, ref=None, extra="", pid="t-prof") -> str:
    head = f'schema = 1\n[profile]\nid = "{pid}"\ntitle = "test"\nrevision = "A"\n'
    if fs is not None:
        head += f"sample_rate_hz = {fs}\n"
    if ref is not None:
        head += f"reference_hz = {ref}\n"
    return head + extra + bands


def pass_stop(pass_hi, stop_lo, *, min_db, max_db, stop_db, pass_lo=0, stop_hi=24000) -> str:
    return (f'[[band]]\nkind = "pass"\nstart_hz = {pass_lo}\nstop_hz = {pass_hi}\nmin_db = {min_db}\nmax_db = {max_db}\n'
            f'[[band]]\nkind = "stop"\nstart_hz = {stop_lo}\nstop_hz = {stop_hi}\nmax_db = {stop_db}\n')


def sos_json(sos, fs=FS, **kw):
    return {"format": "sos", "sample_rate_hz": fs, "sos": np.asarray(sos).tolist(), **kw}


def scipy_response(kind, coeffs, f, fs=None):
    """Reference response straight from scipy.signal (independent of FilterDesign)."""
    if kind == "sos":
        return signal.sosfreqz(coeffs, worN=f, fs=fs)[1]
    if kind == "ba":
        return signal.freqz(*coeffs, worN=f, fs=fs)[1]
    if kind == "zpk":
        return signal.freqz_zpk(*coeffs, worN=f, fs=fs)[1]
    if kind == "azpk":
        return signal.freqs_zpk(*coeffs, worN=2 * np.pi * f)[1]
    raise ValueError(kind)


def brute_force(kind, coeffs, mask: Mask, fs=None, n=10**6):
    """Worst margin on 10^6 linear points (plus the band edges) with scipy responses and
    margins computed here from the band definitions (pass / stop / limit lines).
    Returns (worst margin dB, frequency, freq grid, margins)."""
    f = np.unique(np.concatenate([np.linspace(mask.f_min_hz, mask.f_max_hz, n), mask.edges_hz()]))
    with np.errstate(divide="ignore"):
        g = 20 * np.log10(np.abs(scipy_response(kind, coeffs, f, fs)))
    if mask.reference_hz is not None:
        g = g - 20 * np.log10(abs(scipy_response(kind, coeffs, np.array([mask.reference_hz]), fs)[0]))
    m = np.full(f.shape, np.inf)
    for b in mask.bands:
        inside = (f >= b.start_hz) & (f <= b.stop_hz)
        if b.kind == "pass":
            mb = np.minimum(b.max_db - g, g - b.min_db)
        elif b.kind == "stop":
            mb = b.max_db - g
        else:
            mb = np.full(f.shape, np.inf)
            for line, sign in ((b.upper, 1), (b.lower, -1)):
                if line is None:
                    continue
                with np.errstate(divide="ignore"):
                    lim = np.interp(np.log10(f), np.log10(line.freq_hz), line.value)
                mb = np.minimum(mb, sign * (lim - g))
        m = np.where(inside, np.minimum(m, mb), m)
    i = int(np.argmin(m))
    return float(m[i]), float(f[i]), f, m


# --------------------------------------------------------------------------------------
# textbook orders and responses
# --------------------------------------------------------------------------------------
def _butter_cutoff(n, wp, ws, ap, as_, meet):
    """Textbook Butterworth (REFERENCES.md): |H|^2 = 1/(1 + (w/wc)^(2n)); the cutoff
    that meets the pass-band (or stop-band) attenuation exactly, in warped frequency."""
    if meet == "pass":
        return wp / (10 ** (ap / 10) - 1) ** (1 / (2 * n))
    return ws / (10 ** (as_ / 10) - 1) ** (1 / (2 * n))


def test_buttord_order_matches_textbook_and_lower_order_fails(tmp_path):
    fp, fst, ap, as_ = 1000.0, 2000.0, 0.5, 40.0
    n, wn = signal.buttord(fp, fst, ap, as_, fs=FS)
    # textbook order with bilinear pre-warping tan(pi f / fs) (REFERENCES.md formula)
    wp, ws = math.tan(math.pi * fp / FS), math.tan(math.pi * fst / FS)
    n_book = math.ceil(math.log10((10 ** (as_ / 10) - 1) / (10 ** (ap / 10) - 1)) / (2 * math.log10(ws / wp)))
    assert n == n_book == 9
    # buttord's cutoff meets the pass band exactly: 1e-6 dB slack for rounding (common practice)
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(fp, fst, min_db=-ap - 1e-6, max_db=1e-6,
                                                            stop_db=-as_ + 1e-6)))
    good = write_json(tmp_path, "good.json", sos_json(signal.butter(n, wn, fs=FS, output="sos")))
    assert main(["design-check", str(prof), str(good)]) == 0
    # one order lower fails whichever cutoff is chosen: meeting the pass band exactly
    # breaks the stop band and vice versa
    for meet in ("pass", "stop"):
        wc = _butter_cutoff(n - 1, wp, ws, ap, as_, meet)
        fc = FS / math.pi * math.atan(wc)
        low = write_json(tmp_path, f"low-{meet}.json", sos_json(signal.butter(n - 1, fc, fs=FS, output="sos")))
        assert main(["design-check", str(prof), str(low)]) == 1
    # and the order-n design with either extreme cutoff passes
    for meet in ("pass", "stop"):
        fc = FS / math.pi * math.atan(_butter_cutoff(n, wp, ws, ap, as_, meet))
        d = FilterDesign.from_sos(signal.butter(n, fc, fs=FS, output="sos"), FS)
        from harness.profile import load_profile
        assert evaluate_design(d, load_profile(prof).mask).mask_result.gain_passed


@pytest.mark.parametrize("family", ["ellip", "cheby1"])
def test_ellip_and_cheby1_meet_their_spec_one_order_lower_fails(tmp_path, family):
    fp, fst, ap, as_ = 1000.0, 2000.0, 0.5, 40.0
    if family == "ellip":
        n, wn = signal.ellipord(fp, fst, ap, as_, fs=FS)

        def design(order):
            return signal.ellip(order, ap, as_, wn, fs=FS, output="sos")
    else:
        n, wn = signal.cheb1ord(fp, fst, ap, as_, fs=FS)
        # textbook Chebyshev I order (REFERENCES.md) with pre-warped frequencies
        wp, ws = math.tan(math.pi * fp / FS), math.tan(math.pi * fst / FS)
        n_book = math.ceil(math.acosh(math.sqrt((10 ** (as_ / 10) - 1) / (10 ** (ap / 10) - 1)))
                           / math.acosh(ws / wp))
        assert n == n_book

        def design(order):
            return signal.cheby1(order, ap, wn, fs=FS, output="sos")
    # equiripple designs touch their limits exactly: 1e-6 dB slack for rounding (common practice)
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(fp, fst, min_db=-ap - 1e-6, max_db=1e-6,
                                                            stop_db=-as_ + 1e-6)))
    good = write_json(tmp_path, "good.json", sos_json(design(n)))
    assert main(["design-check", str(prof), str(good)]) == 0
    low = write_json(tmp_path, "low.json", sos_json(design(n - 1)))
    assert main(["design-check", str(prof), str(low)]) == 1


@pytest.mark.parametrize("order", [1, 2, 5, 8])
def test_butterworth_cutoff_is_minus_3_0103_db(order):
    fc = 1000.0
    # analog: |H|^2 = 1 / (1 + (f/fc)^(2n)) (REFERENCES.md)
    z, p, k = signal.butter(order, 2 * np.pi * fc, analog=True, output="zpk")
    d = FilterDesign.from_zpk(z, p, k, analog=True)
    f = np.array([fc / 7, fc / 2, fc, 1.7 * fc, 5 * fc])
    book = -10 * np.log10(1 + (f / fc) ** (2 * order))
    np.testing.assert_allclose(d.gain_db(f), book, atol=1e-9)
    assert d.gain_db([fc])[0] == pytest.approx(-TEN_LOG_2, abs=1e-9)
    # digital via the bilinear transform: butter(..., fs=) pre-warps so the cutoff is exact,
    # and the response follows the formula in warped frequency tan(pi f / fs)
    dd = FilterDesign.from_sos(signal.butter(order, fc, fs=FS, output="sos"), FS)
    warped = np.tan(np.pi * f / FS) / np.tan(np.pi * fc / FS)
    np.testing.assert_allclose(dd.gain_db(f), -10 * np.log10(1 + warped ** (2 * order)), atol=1e-9)
    assert dd.gain_db([fc])[0] == pytest.approx(-TEN_LOG_2, abs=1e-9)


# --------------------------------------------------------------------------------------
# dense evaluation against brute force
# --------------------------------------------------------------------------------------
def _cases():
    out = {}
    n, wn = signal.ellipord(1000, 1200, 0.5, 60, fs=FS)
    sos = signal.ellip(n, 0.5, 60, wn, fs=FS, output="sos")
    # sloped stop-band ceiling: the first equiripple stop-band peak is the unique worst point
    m = Mask((Band("pass", 0, 1000, min_db=-1.2, max_db=0.8),
              Band("limits", 1200, 24000, upper=LimitLine((1200, 24000), (-59.5, -50.0)))), sample_rate_hz=FS)
    out["ellip-lowpass"] = ("sos", sos, FS, m)
    for q in (30, 100):
        b, a = signal.iirnotch(1000, q, fs=FS)
        # a V-shaped notch template (limit line): the worst point sits on the notch skirt
        m = Mask((Band("limits", 500, 2000, upper=LimitLine((500, 1000, 2000), (0.2, -40.0, 0.2))),),
                 sample_rate_hz=FS)
        out[f"iirnotch-q{q}"] = ("ba", (b, a), FS, m)
    sos = signal.cheby1(5, 1.0, 3000, fs=FS, output="sos")
    # falling floor: the first pass-band ripple trough is the unique worst point
    m = Mask((Band("limits", 10, 3000, lower=LimitLine((10, 3000), (-1.01, -1.05)),
                   upper=LimitLine((10, 3000), (0.5, 0.5))),
              Band("stop", 8000, 24000, max_db=-40.0)), sample_rate_hz=FS)
    out["cheby1-lowpass"] = ("sos", sos, FS, m)
    # two-pole resonator, r = 0.999: the peak is near, not at, the pole angle
    th, r = 2 * np.pi * 3000 / FS, 0.999
    b, a = np.array([1 - r]), np.array([1, -2 * r * np.cos(th), r * r])
    m = Mask((Band("stop", 20, 20000, max_db=3.0),), sample_rate_hz=FS)
    out["resonator"] = ("ba", (b, a), FS, m)
    z, p, k = signal.ellip(6, 0.3, 50, 2 * np.pi * 1000, analog=True, output="zpk")
    m = Mask((Band("limits", 1, 1000, upper=LimitLine((1, 1000), (0.02, 0.1)), lower=LimitLine((1, 1000), (-0.4, -0.4))),
              Band("limits", 1300, 100000, upper=LimitLine((1300, 100000), (-49.0, -45.0)))))
    out["analog-ellip"] = ("azpk", (z, p, k), None, m)
    return out


CASES = _cases()


def _design(kind, coeffs, fs):
    if kind == "sos":
        return FilterDesign.from_sos(coeffs, fs)
    if kind == "ba":
        return FilterDesign.from_ba(*coeffs, fs)
    if kind == "zpk":
        return FilterDesign.from_zpk(*coeffs, fs)
    return FilterDesign.from_zpk(*coeffs, analog=True)


@pytest.mark.parametrize("name", sorted(CASES))
def test_dense_evaluation_matches_brute_force(name):
    kind, coeffs, fs, mask = CASES[name]
    res = evaluate_design(_design(kind, coeffs, fs), mask)
    bm, bf, f, m = brute_force(kind, coeffs, mask, fs)
    assert res.certified
    worst = res.worst_margin_db
    # the refined worst is never above the brute-force one (it is an evaluated point,
    # and it is the true minimum) and agrees within 1e-4 dB
    assert worst <= bm + 1e-9
    assert worst == pytest.approx(bm, abs=1e-4)
    # the worst frequency: within the region where the brute-force margin is within
    # 1e-6 dB of its minimum, widened by three brute-force steps
    near = f[m <= bm + 1e-6]
    step = (mask.f_max_hz - mask.f_min_hz) / 1e6
    fw = res.mask_result.freq_hz[res.mask_result.worst_index]
    assert near.min() - 3 * step <= fw <= near.max() + 3 * step
    # the worst point is a genuine interior point, not a band edge (otherwise the case tests nothing)
    assert not np.any(np.isclose(fw, mask.edges_hz(), rtol=1e-6))


@pytest.mark.parametrize("name", sorted(CASES))
def test_a_coarse_grid_still_finds_the_worst_point(name):
    """With a 16-point base grid the certification alone must find the same worst margin."""
    kind, coeffs, fs, mask = CASES[name]
    fine = evaluate_design(_design(kind, coeffs, fs), mask)
    coarse = evaluate_design(_design(kind, coeffs, fs), mask, points=16)
    assert coarse.certified
    assert coarse.worst_margin_db == pytest.approx(fine.worst_margin_db, abs=1e-4)


@pytest.mark.parametrize("q", [30, 100, 1000])
def test_a_notch_inside_a_pass_band_is_never_missed(q):
    f0 = 1234.567          # deliberately off any round grid value
    b, a = signal.iirnotch(f0, q, fs=FS)
    mask = Mask((Band("pass", 20, 20000, min_db=-1.0, max_db=1.0),), sample_rate_hz=FS)
    res = evaluate_design(FilterDesign.from_ba(b, a, FS), mask, points=16)
    # the notch floor: scipy says the zeros sit on the unit circle at f0
    assert res.worst_margin_db < -100
    assert res.mask_result.freq_hz[res.mask_result.worst_index] == pytest.approx(f0, rel=1e-6)
    assert not res.passed


@pytest.mark.parametrize("name", ["ellip-lowpass", "iirnotch-q100", "resonator", "analog-ellip"])
def test_interval_bounds_hold_against_brute_force(name):
    """The certificate rests on these bounds: upper/lower bounds of the gain over an
    interval and a bound of its second derivative; check them on random intervals."""
    kind, coeffs, fs, mask = CASES[name]
    d = _design(kind, coeffs, fs)
    rng = np.random.default_rng(7)
    top = mask.f_max_hz
    fa = np.sort(rng.uniform(mask.f_min_hz + 1, top * 0.99, 60))
    # widths from 1e-4 Hz to 300 Hz, plus intervals centred on every critical frequency
    widths = 10 ** rng.uniform(-4, 2.5, fa.size)
    crit = d.critical_freqs_hz()
    crit = crit[(crit > 5) & (crit < top * 0.99)]
    fa = np.concatenate([fa, crit - 2.0, crit - 0.01])
    fb = np.concatenate([np.minimum(fa[:60] + widths, top), crit + 3.0, crit + 0.02])
    ub, lb, curv = _interval_bounds(d, fa, fb)
    checked = 0
    for a, b, u, lo, c in zip(fa, fb, ub, lb, curv):
        x = np.linspace(a, b, 401)
        mag = np.abs(scipy_response(kind, coeffs, x, fs))
        # compare in linear |H| with an absolute allowance for rounding: the float64 roots
        # of the coefficients sit a few ulps off the exact ones (1e-15), which near a zero
        # on the unit circle moves |H| by about 1e-13 (deep in a notch |H| is rounding noise)
        assert np.all(mag <= 10 ** (u / 20) * (1 + 1e-9) + 1e-12)
        assert np.all(mag >= 10 ** (lo / 20) * (1 - 1e-9) - 1e-12)
        if b - a < 0.5 or c > 1e200:
            continue      # steps below ~1e-3 Hz give rounding noise; an infinite bound holds trivially
        g = 20 * np.log10(np.maximum(mag, 1e-300))
        h = x[1] - x[0]
        d2 = np.abs(np.diff(g, 2)) / h ** 2
        # allowance for rounding: about 1e-13 relative in |H| per value (generous)
        noise = 4 * 8.686 * 1e-13 * (1 + 1 / np.maximum(mag[1:-1], 1e-30)) / h ** 2
        ok = mag[1:-1] > 1e-6
        assert np.all(d2[ok] <= c * (1 + 1e-6) + noise[ok])
        checked += 1
    assert checked >= 20


def test_long_fir_is_certified_from_its_coefficients():
    """numpy.roots of a 101-tap FIR are far off (roots near 1e15), so the b/a design is
    certified from its coefficients; the worst point must still match brute force."""
    b = signal.firwin(101, 12000, fs=FS)
    d = FilterDesign.from_ba(b, [1.0], FS)
    # sloped ceiling over the pass band: a unique interior worst ripple peak
    mask = Mask((Band("limits", 10, 10000, upper=LimitLine((10, 10000), (0.02, 0.03)),
                      lower=LimitLine((10, 10000), (-0.5, -0.5))),
                 Band("stop", 14000, 24000, max_db=-50.0)), sample_rate_hz=FS)
    res = evaluate_design(d, mask)
    bm, bf, f, m = brute_force("ba", (b, [1.0]), mask, FS)
    assert res.certified
    assert res.worst_margin_db <= bm + 1e-9
    assert res.worst_margin_db == pytest.approx(bm, abs=1e-4)


def test_deep_stop_band_is_proved_safe_not_refined():
    # Parks-McClellan FIR: about -190 dB in the stop band, 140 dB below the ceiling
    b = signal.remez(151, [0, 10000, 14000, 24000], [1, 0], fs=FS)
    mask = Mask((Band("pass", 0, 10000, min_db=-0.5, max_db=0.5), Band("stop", 14000, 24000, max_db=-50.0)),
                sample_rate_hz=FS)
    res = evaluate_design(FilterDesign.from_ba(b, [1.0], FS), mask)
    assert res.certified and res.passed
    assert set(res.loose_db) == {1}
    assert 1.0 <= res.loose_db[1] <= res.bands[1].worst_margin_db
    # the proved bound is a true lower bound (scipy, brute force)
    _, _, f, m = brute_force("ba", (b, [1.0]), mask, FS)
    assert np.min(m[f >= 14000]) >= res.loose_db[1]


@pytest.mark.parametrize("kind", ["fir", "iir"])
def test_coefficient_bounds_hold_against_brute_force(kind):
    if kind == "fir":
        b, a = signal.firwin(61, 9000, fs=FS), np.array([1.0])
    else:
        b, a = signal.ellip(6, 0.5, 50, 3000, fs=FS)
    d = FilterDesign.from_ba(b, a, FS)
    rng = np.random.default_rng(3)
    fa = rng.uniform(1, 23000, 80)
    fb = np.minimum(fa + 10 ** rng.uniform(-3, 2.7, fa.size), 24000)
    ub, lb = _ba_interval_bounds(d, fa, fb)
    for x0, x1, u, lo in zip(fa, fb, ub, lb):
        x = np.linspace(x0, x1, 301)
        mag = np.abs(signal.freqz(b, a, worN=x, fs=FS)[1])
        assert np.all(mag <= 10 ** (u / 20) * (1 + 1e-9) + 1e-13)
        assert np.all(mag >= 10 ** (lo / 20) * (1 - 1e-9) - 1e-13)


def test_group_delay_analytic_matches_scipy_and_textbook():
    # a 4th-order elliptic band-pass at fs/8: well conditioned enough for scipy's b/a formula
    b, a = signal.ellip(2, 0.5, 40, [5000, 7000], btype="bandpass", fs=FS)
    sos = signal.ellip(2, 0.5, 40, [5000, 7000], btype="bandpass", fs=FS, output="sos")
    f = np.linspace(10, 23000, 777)
    with warnings.catch_warnings():
        warnings.simplefilter("error")                              # scipy must not flag it
        ref = signal.group_delay((b, a), w=f, fs=FS)[1] / FS       # scipy, samples -> s
    for d in (FilterDesign.from_sos(sos, FS), FilterDesign.from_zpk(*signal.sos2zpk(sos), FS),
              FilterDesign.from_ba(b, a, FS)):
        np.testing.assert_allclose(d.group_delay_s(f), ref, rtol=1e-7, atol=1e-12)
    # an 8th-order elliptic low-pass as b/a: scipy's formula breaks down (it warns), the
    # design falls back to the analytic sum and agrees with the sos form
    n, wn = signal.ellipord(1000, 1200, 0.5, 60, fs=FS)
    b, a = signal.ellip(n, 0.5, 60, wn, fs=FS)
    sos = signal.ellip(n, 0.5, 60, wn, fs=FS, output="sos")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bad = signal.group_delay((b, a), w=f, fs=FS)[1] / FS
    good = FilterDesign.from_sos(sos, FS).group_delay_s(f)
    assert np.min(bad) < 0 < np.min(good)          # scipy's b/a result is unusable here
    # the roots of this 17-coefficient polynomial are themselves ill-conditioned
    # (about 1e-4 relative): the b/a design agrees with the sos one to that level
    np.testing.assert_allclose(FilterDesign.from_ba(b, a, FS).group_delay_s(f), good, rtol=2e-3)
    # analog first-order low-pass 1/(s + a): tau = a / (a^2 + W^2) (textbook, from memory)
    aa = 2 * np.pi * 500.0
    d = FilterDesign.from_zpk([], [-aa], aa, analog=True)
    w = 2 * np.pi * f
    np.testing.assert_allclose(d.group_delay_s(f), aa / (aa ** 2 + w ** 2), rtol=1e-12)
    # FIR b = [1, 1]: linear phase, half a sample of delay (textbook)
    d = FilterDesign.from_ba([1.0, 1.0], [1.0], FS)
    np.testing.assert_allclose(d.group_delay_s(f[f < 20000]), 0.5 / FS, rtol=1e-9)
    # a symmetric N-tap FIR has linear phase with delay (N - 1)/2 samples (textbook);
    # firwin's stop-band zeros sit on the unit circle, where scipy's group_delay warns
    d = FilterDesign.from_ba(signal.firwin(101, 12000, fs=FS), [1.0], FS)
    fp = np.linspace(10, 11000, 300)
    np.testing.assert_allclose(d.group_delay_s(fp), 50.0 / FS, rtol=1e-9)


def test_critical_frequencies_include_the_notch_and_pole_angles():
    b, a = signal.iirnotch(1000, 30, fs=FS)
    d = FilterDesign.from_ba(b, a, FS)
    crit = d.critical_freqs_hz()
    assert np.any(np.isclose(crit, 1000.0, rtol=1e-9))
    # analog resonance s^2 + s w0/Q + w0^2: |Im p| and |p| = w0 both listed
    w0, q = 2 * np.pi * 5000, 20
    d = FilterDesign.from_zpk([], np.roots([1, w0 / q, w0 ** 2]), w0 ** 2, analog=True)
    crit = d.critical_freqs_hz()
    assert np.any(np.isclose(crit, 5000.0, rtol=1e-9))
    assert np.any(np.isclose(crit, 5000.0 * math.sqrt(1 - 1 / (4 * q * q)), rtol=1e-9))


def test_phase_rule_uses_exact_group_delay(tmp_path):
    n, wn = signal.buttord(1000, 2000, 0.5, 40, fs=FS)
    sos = signal.butter(n, wn, fs=FS, output="sos")
    d = FilterDesign.from_sos(sos, FS)
    f = np.array([10.0, 500.0, 1000.0])
    gd = d.group_delay_s(f)
    mask = Mask((Band("pass", 10, 1000, min_db=-0.5, max_db=0.01), Band("stop", 2000, 24000, max_db=-40)),
                sample_rate_hz=FS, phase=__import__("harness.mask", fromlist=["PhaseRule"]).PhaseRule(
                    "none", max_group_delay_s=float(gd.max()) * 0.9))
    res = evaluate_design(d, mask)
    ph = res.phase
    assert ph is not None and not ph.passed
    # reference: scipy.signal.group_delay of each (well-conditioned) biquad, summed over
    # the cascade (group delays of cascaded sections add)
    def ref_gd(freq):
        return sum(signal.group_delay((row[:3], row[3:]), w=freq, fs=FS)[1] for row in sos) / FS

    i = int(np.argmax(ph.group_delay_s))
    fpk = ph.freq_hz[mask.in_pass_band(ph.freq_hz)][i]
    assert ph.group_delay_s[i] == pytest.approx(ref_gd([fpk])[0], rel=1e-9)
    # and no pass-band frequency has more delay (dense check with scipy)
    assert np.max(ref_gd(np.linspace(10, 1000, 20001))) <= ph.group_delay_s[i] * (1 + 1e-9)


# --------------------------------------------------------------------------------------
# coefficient files
# --------------------------------------------------------------------------------------
def _ellip_digital():
    return signal.ellip(4, 0.5, 40, 2000, fs=FS, output="sos")


def _all_digital_files(tmp_path):
    sos = _ellip_digital()
    b, a = signal.sos2tf(sos)
    z, p, k = signal.sos2zpk(sos)
    files = {}
    files["json-sos"] = write_json(tmp_path, "e_sos.json", sos_json(sos, id="e", title="t", comment="c", schema=1))
    files["json-ba"] = write_json(tmp_path, "e_ba.json", {"format": "ba", "b": b.tolist(), "a": a.tolist(),
                                                          "sample_rate_hz": FS})
    pair = lambda r: [[float(x.real), float(x.imag)] for x in r]  # noqa: E731
    files["json-zpk"] = write_json(tmp_path, "e_zpk.json", {"format": "zpk", "z": pair(z), "p": pair(p),
                                                            "k": float(k), "sample_rate_hz": FS})
    rows = "\n".join(",".join(repr(float(x)) for x in row) for row in sos)
    files["csv"] = write(tmp_path, "e.csv", f"# an elliptic test filter\n# sample_rate_hz = 48000\nb0,b1,b2,a0,a1,a2\n{rows}\n")
    files["csv-ws"] = write(tmp_path, "e_ws.csv", "\n".join(" ".join(repr(float(x)) for x in row) for row in sos)
                            + "\n# fs = 48000\n")
    np.savez(tmp_path / "e_sos.npz", sos=sos, sample_rate_hz=FS)
    np.savez(tmp_path / "e_ba.npz", b=b, a=a, fs=FS)
    np.savez(tmp_path / "e_zpk.npz", z=z, p=p, k=k, fs=np.array([FS]))
    files["npz-sos"] = tmp_path / "e_sos.npz"
    files["npz-ba"] = tmp_path / "e_ba.npz"
    files["npz-zpk"] = tmp_path / "e_zpk.npz"
    return sos, files


def test_all_digital_formats_give_the_same_response(tmp_path):
    sos, files = _all_digital_files(tmp_path)
    f = np.concatenate([np.geomspace(1, 24000, 500), [2000.0, 24000.0]])
    ref = signal.sosfreqz(sos, worN=f, fs=FS)[1]
    for name, path in files.items():
        d = load_coefficients(path)
        assert d.digital and d.sample_rate_hz == FS, name
        np.testing.assert_allclose(d.response(f), ref, rtol=1e-8, atol=1e-12, err_msg=name)
        assert d.order == 4, name
    d = load_coefficients(files["json-sos"])
    assert (d.id, d.title, d.comment) == ("e", "t", "c")


FIXTURES = __import__("pathlib").Path(__file__).resolve().parent.parent / "fixtures" / "coeffs-test"


def test_committed_example_files_match_their_scipy_designs():
    """fixtures/coeffs-test holds one filter in every file form (written by its
    make_fixtures.py); each must read back as the scipy design it states."""
    f = np.geomspace(1, 24000, 300)
    ref = signal.sosfreqz(signal.ellip(4, 0.5, 40, 2000, fs=FS, output="sos"), worN=f, fs=FS)[1]
    names = ["ka200-ellip4-sos.json", "ka200-ellip4-ba.json", "ka200-ellip4-zpk.json", "ka200-ellip4.csv",
             "ka200-ellip4-sos.npz"]
    for name in names:
        d = load_coefficients(FIXTURES / name)
        assert d.id == "ka200-dsp-ellip4" and d.order == 4 and d.sample_rate_hz == FS, name
        np.testing.assert_allclose(d.response(f), ref, rtol=1e-9, atol=1e-13, err_msg=name)
    d = load_coefficients(FIXTURES / "analog-cheby1-zpk.json")
    z, p, k = signal.cheby1(5, 1.0, 2 * np.pi * 3000, analog=True, output="zpk")
    np.testing.assert_allclose(d.response(f), signal.freqs_zpk(z, p, k, worN=2 * np.pi * f)[1], rtol=1e-9)


def test_csv_without_sample_rate_takes_the_profile_rate(tmp_path, capsys):
    sos = _ellip_digital()
    path = write(tmp_path, "nofs.csv", "\n".join(",".join(repr(float(x)) for x in row) for row in sos) + "\n")
    with pytest.raises(ConfigError) as e:
        load_coefficients(path)
    assert "sample_rate_hz" in str(e.value)
    d = load_coefficients(path, default_sample_rate_hz=FS)
    assert d.sample_rate_hz == FS and any("profile" in n for n in d.notes)
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 3000, min_db=-0.6, max_db=0.1, stop_db=-39)))
    main(["design-check", str(prof), str(path)])
    assert "taken from the profile" in capsys.readouterr().out


def test_analog_formats_give_the_same_response(tmp_path):
    z, p, k = signal.cheby1(5, 1.0, 2 * np.pi * 3000, analog=True, output="zpk")
    b, a = signal.zpk2tf(z, p, k)
    sos = signal.cheby1(5, 1.0, 2 * np.pi * 3000, analog=True, output="sos")
    pair = lambda r: [[float(x.real), float(x.imag)] for x in r]  # noqa: E731
    paths = [write_json(tmp_path, "a_zpk.json", {"format": "zpk", "domain": "analog", "z": pair(z),
                                                 "p": pair(p), "k": float(k)}),
             write_json(tmp_path, "a_ba.json", {"format": "ba", "domain": "analog", "b": b.tolist(), "a": a.tolist()}),
             write_json(tmp_path, "a_sos.json", {"format": "sos", "domain": "analog", "sos": sos.tolist()}),
             write(tmp_path, "a.csv", "# domain = analog\n" + "\n".join(",".join(repr(float(x)) for x in r) for r in sos))]
    np.savez(tmp_path / "a.npz", z=z, p=p, k=k, domain=np.array("analog"))
    paths.append(tmp_path / "a.npz")
    f = np.geomspace(1, 100000, 400)
    ref = signal.freqs_zpk(z, p, k, worN=2 * np.pi * f)[1]
    for path in paths:
        d = load_coefficients(path)
        assert not d.digital and d.sample_rate_hz is None
        np.testing.assert_allclose(d.response(f), ref, rtol=1e-8, err_msg=str(path))
        assert d.order == 5


BAD_FILES = [
    # (file name, content, key expected in the message, words expected)
    ("syntax.json", '{\n "format": "sos",\n "sos": [[1, 0, 0, 1, 0, 0],]\n}', None, ["line 3", "column"]),
    ("unknown.json", '{"format": "sos", "fs": 48000, "sos": [[1,0,0,1,0,0]]}', "fs", ["sample_rate_hz"]),
    ("typo.json", '{"format": "sos", "sample_rate_hx": 48000, "sos": [[1,0,0,1,0,0]]}', "sample_rate_hx",
     ["did you mean 'sample_rate_hz'"]),
    ("noformat.json", '{"sos": [[1,0,0,1,0,0]], "sample_rate_hz": 48000}', "format", ['"format": "sos"']),
    ("badformat.json", '{"format": "sso", "sos": [[1,0,0,1,0,0]], "sample_rate_hz": 48000}', "format", ["'sos'"]),
    ("shape.json", '{"format": "sos", "sample_rate_hz": 48000, "sos": [[1,0,0,1,0]]}', "sos[0]", ["6 numbers"]),
    ("nan.json", '{"format": "sos", "sample_rate_hz": 48000, "sos": [[1,0,NaN,1,0,0]]}', "sos[0][2]", ["finite"]),
    ("a0.json", '{"format": "sos", "sample_rate_hz": 48000, "sos": [[1,0,0,1,0,0],[1,0,0,0,0.5,0]]}',
     "sos[1][3]", ["a0 is 0"]),
    ("ba_a0.json", '{"format": "ba", "sample_rate_hz": 48000, "b": [1], "a": [0, 1]}', "a[0]", ["a[0] is 0"]),
    ("nofs.json", '{"format": "sos", "sos": [[1,0,0,1,0,0]]}', "sample_rate_hz", ["digital"]),
    ("analogfs.json", '{"format": "ba", "domain": "analog", "b": [1], "a": [1, 1], "sample_rate_hz": 48000}',
     "sample_rate_hz", ["analog"]),
    ("mixed.json", '{"format": "sos", "sample_rate_hz": 48000, "sos": [[1,0,0,1,0,0]], "b": [1]}', "b",
     ["format 'ba'"]),
    ("conj.json", '{"format": "zpk", "sample_rate_hz": 48000, "z": [[0.5, 0.5]], "p": [0.1], "k": 1}', "z[0]",
     ["conjugate"]),
    ("k0.json", '{"format": "zpk", "sample_rate_hz": 48000, "z": [], "p": [0.5], "k": 0}', "k", ["passes nothing"]),
    ("str.json", '{"format": "ba", "sample_rate_hz": 48000, "b": ["1"], "a": [1]}', "b[0]", ["number"]),
    ("list.json", '[1, 2, 3]', None, ["JSON object"]),
    ("huge.json", '{"format": "ba", "sample_rate_hz": 48000, "b": [1' + "0" * 400 + '], "a": [1]}', "b[0]", []),
    ("bad.csv", "# sample_rate_hz = 48000\n1,0,0,1,0,0\n1,0,x,1,0,0\n", "line 3, b2", ["not a number"]),
    ("cols.csv", "# sample_rate_hz = 48000\n1,0,0,1,0\n", "line 2", ["6 numbers"]),
    ("directive.csv", "# sample_rate = 48000\n1,0,0,1,0,0\n", "line 1: sample_rate", ["sample_rate_hz"]),
    ("header.csv", "# fs = 48000\nnum0,num1,num2,den0,den1,den2\n1,0,0,1,0,0\n", "line 2", ["header"]),
    ("a0.csv", "# fs = 48000\n1,0,0,1,0,0\n1,0,0,0,1,0\n", "line 3, a0", ["a0 is 0"]),
    ("empty.csv", "# fs = 48000\n", None, ["no section rows"]),
    ("coeffs.mat", "whatever", None, [".json, .csv or .npz"]),
]


@pytest.mark.parametrize("name,content,key,words", BAD_FILES, ids=[b[0] for b in BAD_FILES])
def test_bad_coefficient_files_exit_2_naming_file_and_key(tmp_path, capsys, name, content, key, words):
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 3000, min_db=-1, max_db=1, stop_db=-20)))
    path = write(tmp_path, name, content)
    assert main(["design-check", str(prof), str(path)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert str(path) in err
    if key:
        assert f": {key}:" in err
    for w in words:
        assert w in err


def test_bad_npz_files_exit_2(tmp_path, capsys):
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 3000, min_db=-1, max_db=1, stop_db=-20)))
    cases = {}
    (tmp_path / "garbage.npz").write_bytes(b"not a zip archive")
    cases["garbage.npz"] = ["NumPy .npz"]
    np.savez(tmp_path / "unknown.npz", sos=np.eye(1, 6) + [[0, 0, 0, 1, 0, 0]], fs=FS, gain=1.0)
    cases["unknown.npz"] = ["gain", "did you mean 'k'"]
    np.savez(tmp_path / "shape.npz", sos=np.ones((2, 5)), fs=FS)
    cases["shape.npz"] = ["sos", "shape"]
    np.savez(tmp_path / "both.npz", b=[1.0], a=[1.0], fs=FS, sample_rate_hz=FS)
    cases["both.npz"] = ["fs", "not both"]
    np.savez(tmp_path / "nofs.npz", b=[1.0], a=[1.0])
    cases["nofs.npz"] = ["sample_rate_hz"]
    np.savez(tmp_path / "inf.npz", b=[1.0, np.inf], a=[1.0], fs=FS)
    cases["inf.npz"] = ["b[1]", "finite"]
    np.savez(tmp_path / "objects.npz", b=np.array([1, "x"], dtype=object), a=[1.0], fs=FS)
    cases["objects.npz"] = ["NumPy .npz"]
    for name, words in cases.items():
        assert main(["design-check", str(prof), str(tmp_path / name)]) == 2, name
        err = capsys.readouterr().err
        assert "Traceback" not in err and name in err
        for w in words:
            assert w in err, (name, err)


def test_missing_file_and_sample_rate_mismatch(tmp_path, capsys):
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 3000, min_db=-1, max_db=1, stop_db=-20)))
    assert main(["design-check", str(prof), str(tmp_path / "nope.json")]) == 2
    err = capsys.readouterr().err
    assert "nope.json" in err and "not found" in err
    path = write_json(tmp_path, "d44.json", sos_json(signal.butter(4, 1000, fs=44100, output="sos"), fs=44100))
    assert main(["design-check", str(prof), str(path)]) == 2
    err = capsys.readouterr().err
    assert "d44.json: sample_rate_hz" in err and "44100" in err and "48000" in err
    # a digital design whose Nyquist lies below an analog profile's top frequency
    aprof = write(tmp_path, "a.toml", profile_text(pass_stop(1000, 3000, min_db=-1, max_db=1, stop_db=-20,
                                                             stop_hi=40000), fs=None))
    assert main(["design-check", str(aprof), str(path)]) == 2
    assert "Nyquist" in capsys.readouterr().err
    # an analog profile may state its converter's sample rate: a digital design at another
    # rate is fine as long as the mask lies below the design's Nyquist frequency
    aprof = write(tmp_path, "a2.toml", profile_text(pass_stop(1000, 3000, min_db=-1, max_db=1, stop_db=-20,
                                                              stop_hi=20000), fs=48000,
                                                    extra='domain = "analog"\n'))
    assert main(["design-check", str(aprof), str(path)]) in (0, 1)
    capsys.readouterr()


def test_analog_design_against_digital_profile_is_evaluated_in_hz(tmp_path, capsys):
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 4000, min_db=-0.5, max_db=0.01, stop_db=-40)))
    z, p, k = signal.butter(6, 2 * np.pi * 1400, analog=True, output="zpk")
    path = write_json(tmp_path, "an.json", {"format": "zpk", "domain": "analog", "z": [], "k": float(k),
                                            "p": [[float(x.real), float(x.imag)] for x in p]})
    assert main(["design-check", str(prof), str(path)]) == 0
    out = capsys.readouterr().out
    assert "analog" in out and "PASS" in out


def test_unstable_design_is_warned_about_and_fails(tmp_path, capsys):
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 3000, min_db=-60, max_db=60, stop_db=60)))
    path = write_json(tmp_path, "u.json", {"format": "ba", "b": [1.0], "a": [1.0, -1.01], "sample_rate_hz": FS})
    assert main(["design-check", str(prof), str(path)]) == 1
    out = capsys.readouterr().out
    assert "warning: not stable" in out and "1.01" in out and "FAIL" in out
    d = load_coefficients(path)
    assert not d.stable and any("not stable" in w for w in d.warnings)
    ana = FilterDesign.from_zpk([], [0.5 * 2 * np.pi], 1.0, analog=True)
    assert not ana.stable


def test_zpk_with_more_zeros_than_poles_is_made_causal():
    d = FilterDesign.from_zpk([-1.0], [], 0.5, FS)
    assert d.poles.size == 1 and d.notes
    # equals the causal FIR (1 + z^-1)/2 from scipy.signal.freqz
    f = np.linspace(0, 24000, 101)
    np.testing.assert_allclose(d.response(f), signal.freqz([0.5, 0.5], [1.0], worN=f, fs=FS)[1], atol=1e-14)


# --------------------------------------------------------------------------------------
# fixed point
# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("spec,m,n", [("Q1.15", 1, 15), ("Q2.14", 2, 14), ("Q2.30", 2, 30), ("Q3.12", 3, 12),
                                      ("q4.20", 4, 20)])
def test_quantisation_error_is_at_most_half_an_lsb(spec, m, n):
    b, a = signal.iirnotch(10000, 30, fs=FS)          # |coefficients| < 1: fits every format here
    sos = np.vstack([signal.tf2sos(b, a), signal.butter(2, 5000, fs=FS, output="sos") * [1, 1, 1, 1, 1, 1]])
    sos = sos[np.max(np.abs(np.delete(sos, 3, axis=1)), axis=1) < 1]   # rows that fit Q1.15
    sq, rep = quantize_sos(sos, spec)
    assert rep.qformat == QFormat(m, n)
    assert np.all(sq[:, 3] == 1.0)
    stored = np.delete(sq, 3, axis=1)
    # every stored value is an integer multiple of 2^-n
    assert np.all(stored * 2.0 ** n == np.round(stored * 2.0 ** n))
    assert np.max(np.abs(sq - sos)) <= 2.0 ** -(n + 1)
    assert rep.max_abs_error <= 2.0 ** -(n + 1)
    # rounding is to the nearest multiple: nothing closer exists (independent numpy check)
    np.testing.assert_array_equal(stored, np.round(np.delete(sos, 3, axis=1) * 2.0 ** n) / 2.0 ** n)


def test_quantisation_normalises_a0():
    sos = signal.butter(2, 3000, fs=FS, output="sos") * 2.0          # a0 = 2
    sq, rep = quantize_sos(sos, "Q3.13")
    assert rep.normalised and np.all(sq[:, 3] == 1.0)
    assert np.max(np.abs(sq - sos / 2.0)) <= 2.0 ** -14


def test_quantisation_overflow_names_section_coefficient_and_a_format_that_fits():
    # Butterworth low-pass sections have b = [1, 2, 1] and a1 near -2
    sos = signal.butter(4, 1000, fs=FS, output="sos")
    with pytest.raises(ConfigError) as e:
        quantize_sos(sos, "Q1.15")
    msg = str(e.value)
    assert e.value.key == "--quantize"
    assert "section 0 coefficient" in msg and "Q1.15" in msg
    assert "Q3.13" in msg          # b1 = 2 is just outside Q2.14's [-2, 2 - 2^-14]
    # a notch at 1 kHz: a1 ~ -1.99 fits Q2.14 (the helpful suggestion)
    b, a = signal.iirnotch(1000, 30, fs=FS)
    with pytest.raises(ConfigError) as e:
        quantize_sos(signal.tf2sos(b, a), "Q1.15")
    assert "Q2.14" in str(e.value) and "coefficient b1" in str(e.value)   # b1 = -2 b0 cos(w0) comes first
    # rounding up to exactly 2^(m-1) overflows too (1 - 2^-17 rounds to 1 in Q1.15)
    with pytest.raises(ConfigError):
        quantize_sos([[1 - 2.0 ** -17, 0, 0, 1, 0, 0]], "Q1.15")
    assert quantize_sos([[-1.0, 0, 0, 1, 0, 0]], "Q1.15")[0][0, 0] == -1.0     # -2^(m-1) is representable


def test_a_format_that_zeroes_a_numerator_is_refused():
    sos = signal.ellip(4, 0.5, 40, 2000, fs=FS, output="sos")      # b of section 0 ~ 0.011
    with pytest.raises(ConfigError) as e:
        quantize_sos(sos, "Q3.5")                                  # LSB 1/32: b rounds to 0
    assert e.value.key == "--quantize" and "section 0" in str(e.value) and "pass nothing" in str(e.value)


@pytest.mark.parametrize("spec", ["Q1", "1.15", "Q0.15", "Qa.b", "Q40.40", "Q1.15x", "", "Q.15"])
def test_bad_quantisation_spec_is_a_config_error(spec, tmp_path, capsys):
    with pytest.raises(ConfigError) as e:
        parse_qformat(spec)
    assert e.value.key == "--quantize"
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 3000, min_db=-1, max_db=1, stop_db=-20)))
    path = write_json(tmp_path, "d.json", sos_json(signal.butter(2, 1000, fs=FS, output="sos")))
    assert main(["design-check", str(prof), str(path), "--quantize", spec]) == 2
    err = capsys.readouterr().err
    assert "--quantize" in err and "Traceback" not in err


NOTCH_BANDS = (('pass', 20, 9000, -0.05, 0.05), ('stop', 9998, 10002, None, -25.0),
               ('pass', 11000, 24000, -0.05, 0.05))


def _notch_mask():
    # Q = 100 at 10 kHz: -3 dB width 100 Hz, about -28 dB at +-2 Hz, -0.011 dB at +-1 kHz
    return Mask(tuple(Band(k, a, b, min_db=lo, max_db=hi) for k, a, b, lo, hi in NOTCH_BANDS), sample_rate_hz=FS)


def _notch_profile_text():
    out = ""
    for k, a, b, lo, hi in NOTCH_BANDS:
        out += f'[[band]]\nkind = "{k}"\nstart_hz = {a}\nstop_hz = {b}\nmax_db = {hi}\n'
        if lo is not None:
            out += f"min_db = {lo}\n"
    return profile_text(out)


def _independent_margins(sos_q, mask, n=10**6):
    f = np.unique(np.concatenate([np.linspace(mask.f_min_hz, mask.f_max_hz, n), mask.edges_hz()]))
    g = 20 * np.log10(np.abs(signal.sosfreqz(sos_q, worN=f, fs=FS)[1]))
    out = []
    for b in mask.bands:
        inside = (f >= b.start_hz) & (f <= b.stop_hz)
        m = b.max_db - g if b.kind == "stop" else np.minimum(b.max_db - g, g - b.min_db)
        out.append(float(m[inside].min()))
    return np.array(out)


def test_quantisation_cost_on_a_narrow_notch_grows_with_fewer_bits():
    b, a = signal.iirnotch(10000, 100, fs=FS)          # |a1| ~ 0.51: fits Q1.15
    design = FilterDesign.from_ba(b, a, FS)
    mask = _notch_mask()
    base = evaluate_design(design, mask)
    costs, shifts = {}, {}
    for spec, nbits in (("Q1.15", 15), ("Q2.30", 30)):
        qd, rep = quantize_design(design, spec)
        res = evaluate_design(qd, mask)
        mine = np.array([base.bands[i].worst_margin_db - res.bands[i].worst_margin_db for i in range(3)])
        # independent: round with numpy, evaluate with scipy on 10^6 points
        sos = signal.tf2sos(b, a)
        sos = sos / sos[:, 3:4]
        sq = np.round(sos * 2.0 ** nbits) / 2.0 ** nbits
        sq[:, 3] = 1.0
        indep = _independent_margins(signal.tf2sos(b, a), mask) - _independent_margins(sq, mask)
        np.testing.assert_allclose(mine, indep, atol=2e-5)
        costs[spec] = np.max(np.abs(mine))
        # pole displacement, independently with numpy.roots
        shifts[spec] = np.max(np.abs(np.sort_complex(np.roots(sq[0, 3:])) - np.sort_complex(np.roots(sos[0, 3:]))))
        assert rep.max_pole_shift == pytest.approx(shifts[spec], rel=1e-6, abs=1e-15)
    assert costs["Q1.15"] > 100 * costs["Q2.30"]
    assert costs["Q1.15"] > 1e-4
    assert shifts["Q1.15"] > shifts["Q2.30"]


def test_quantize_rejects_analog_designs(tmp_path, capsys):
    prof = write(tmp_path, "p.toml", profile_text(pass_stop(1000, 3000, min_db=-1, max_db=1, stop_db=-20)))
    path = write_json(tmp_path, "an.json", {"format": "ba", "domain": "analog", "b": [6283.0], "a": [1, 6283.0]})
    assert main(["design-check", str(prof), str(path), "--quantize", "Q1.15"]) == 2
    assert "--quantize" in capsys.readouterr().err


# --------------------------------------------------------------------------------------
# the command end to end
# --------------------------------------------------------------------------------------
def _lowpass_files(tmp_path, order):
    # buttord's cutoff meets -0.5 dB at 1 kHz exactly: 1e-6 dB slack (common practice)
    prof = write(tmp_path, "lp.toml", profile_text(
        pass_stop(1000, 2000, min_db=-0.500001, max_db=0.01, stop_db=-40, pass_lo=10),
        ref=None, extra="transition_max_db = 0.5\n", pid="kestrel-lp"))
    n, wn = signal.buttord(1000, 2000, 0.5, 40, fs=FS)
    path = write_json(tmp_path, f"bw{order}.json", sos_json(signal.butter(order, wn, fs=FS, output="sos"),
                                                            id=f"kestrel-bw{order}"))
    return prof, path, n


def test_cli_pass_prints_table_and_writes_png(tmp_path, capsys):
    prof, path, n = _lowpass_files(tmp_path, 9)
    assert main(["design-check", str(prof), str(path)]) == 0
    out = capsys.readouterr().out
    png = tmp_path / "bw9.design.png"
    assert png.exists() and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    for s in ("kestrel-lp", "kestrel-bw9", "order 9", "fs = 48000 Hz", "worst margin dB", "transition",
              "verdict  PASS", str(png)):
        assert s in out, s
    rows = [ln for ln in out.splitlines() if ln.strip().startswith(("0 ", "1 ", "- "))]
    assert len(rows) == 3 and all(r.rstrip().endswith("pass") for r in rows)
    assert not list(tmp_path.glob("*.tmp"))


def test_cli_fail_and_custom_plot_path(tmp_path, capsys):
    prof, path, n = _lowpass_files(tmp_path, 8)
    plot = tmp_path / "sub" / "x.png"
    plot.parent.mkdir()
    assert main(["design-check", str(prof), str(path), "--plot", str(plot)]) == 1
    out = capsys.readouterr().out
    assert plot.exists() and "verdict  FAIL" in out and "FAIL" in out.split("verdict")[0]
    # unwritable plot location: exit 2, no traceback
    assert main(["design-check", str(prof), str(path), "--plot", str(tmp_path / "missing" / "x.png")]) == 2
    err = capsys.readouterr().err
    assert "cannot write the plot" in err and "Traceback" not in err


def test_cli_quantize_side_by_side(tmp_path, capsys):
    b, a = signal.iirnotch(10000, 100, fs=FS)
    prof = write(tmp_path, "n.toml", _notch_profile_text())
    path = write_json(tmp_path, "notch.json", {"format": "ba", "b": b.tolist(), "a": a.tolist(), "sample_rate_hz": FS})
    rc = main(["design-check", str(prof), str(path), "--quantize", "Q1.15"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "Q1.15 margin" in out and "cost dB" in out and "float margin" in out
    assert "16-bit" in out and "pass/pass" in out


def test_cli_points_option_is_validated(tmp_path, capsys):
    prof, path, n = _lowpass_files(tmp_path, 9)
    assert main(["design-check", str(prof), str(path), "--points", "3"]) == 2
    assert "--points" in capsys.readouterr().err


# --------------------------------------------------------------------------------------
# property: the certified worst margin is never beaten by any frequency
# --------------------------------------------------------------------------------------
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402


@st.composite
def random_design_and_mask(draw):
    """1-3 biquads with poles and zeros anywhere up to very close to the unit circle
    (peaks and notches as narrow as 1e-4 rad), or the same as b/a, and a mask of a pass
    band and a stop band with limits placed near the response so that margins are small."""
    n = draw(st.integers(1, 3))
    sos = []
    for _ in range(n):
        rp = 1 - 10 ** draw(st.floats(-4, -0.5))
        tp = draw(st.floats(0.01, 3.1))
        rz = draw(st.sampled_from([1.0, 0.999, 0.9, 0.5, 1.2]))
        tz = draw(st.floats(0.01, 3.1))
        b = np.poly([rz * np.exp(1j * tz), rz * np.exp(-1j * tz)]).real
        a = np.poly([rp * np.exp(1j * tp), rp * np.exp(-1j * tp)]).real
        sos.append(np.concatenate([b, a]))
    sos = np.array(sos)
    as_ba = draw(st.booleans()) and n <= 2
    f1 = draw(st.floats(100, 10000))
    f2 = draw(st.floats(f1 * 1.05, 23000))
    f = np.linspace(1, 24000, 2001)
    with np.errstate(divide="ignore"):
        g = 20 * np.log10(np.abs(signal.sosfreqz(sos, worN=f, fs=FS)[1]))
    gp = g[(f >= 1) & (f <= f1)]
    gs = g[f >= f2]
    lo = float(np.nanmin(np.where(np.isfinite(gp), gp, np.nan))) + draw(st.floats(-1, 1))
    hi = float(np.nanmax(gp)) + draw(st.floats(-1, 1))
    hi = max(hi, lo + 0.01)
    ceil = float(np.nanmax(gs)) + draw(st.floats(-1, 1))
    mask = Mask((Band("pass", 1, f1, min_db=lo, max_db=hi), Band("stop", f2, 24000, max_db=ceil)),
                sample_rate_hz=FS)
    return sos, as_ba, mask


@settings(max_examples=40, deadline=None)
@given(random_design_and_mask(), st.integers(0, 2**31 - 1))
def test_no_frequency_beats_the_certified_worst_margin(case, seed):
    sos, as_ba, mask = case
    if as_ba:
        b, a = signal.sos2tf(sos)
        d, kind, coeffs = FilterDesign.from_ba(b, a, FS), "ba", (b, a)
    else:
        d, kind, coeffs = FilterDesign.from_sos(sos, FS), "sos", sos
    res = evaluate_design(d, mask, points=64)
    assert res.certified
    rng = np.random.default_rng(seed)
    # random frequencies, plus dense clusters around every pole/zero angle (where narrow
    # features live), checked with scipy
    crit = d.critical_freqs_hz()
    f = np.concatenate([rng.uniform(1, 24000, 4000)]
                       + [c + rng.normal(0, 10 ** rng.uniform(-3, 1), 200) for c in crit])
    f = f[(f >= 1) & (f <= 24000)]
    with np.errstate(divide="ignore"):
        g = 20 * np.log10(np.abs(scipy_response(kind, coeffs, f, FS)))
    lo, hi = mask.limits(f)
    m = np.minimum(np.where(np.isfinite(hi), hi - g, np.inf), np.where(np.isfinite(lo), g - lo, np.inf))
    m = m[np.isfinite(lo) | np.isfinite(hi)]
    assert np.min(m) >= res.worst_margin_db - 1e-4 - 1e-9
    for br in res.bands:
        if br.index in res.loose_db:
            continue
        band = mask.bands[br.index]
        inside = (f >= band.start_hz) & (f <= band.stop_hz)
        mb = (np.minimum(band.max_db - g, g - band.min_db) if band.kind == "pass" else band.max_db - g)[inside]
        if mb.size and np.all(np.isfinite(mb)):
            assert np.min(mb) >= br.worst_margin_db - 1e-4 - 1e-9
