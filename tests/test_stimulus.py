"""Tests of harness.stimulus: multitone and stepped-sine plans.

Check values come from outside the module: Schroeder (IEEE Trans. Inf. Theory 16, 1970)
for the crest factor of a flat multitone, the exact crest factor sqrt(2N) of N
zero-phase cosines (all peak together at n = 0), DFT orthogonality for whole-cycle
tones, and the Cramer-Rao bound for a tone in white noise (Rife & Boorstyn 1974; Kay
1993), checked against a Monte Carlo DFT estimate.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from harness.errors import ConfigError
from harness.profile import parse_profile
from harness.stimulus import (
    MultitonePlan,
    SteppedSinePlan,
    crest_factor,
    multitone_plan,
    plan_for_profile,
    reduce_crest_factor,
    schroeder_phases,
    snap_to_bins,
    stepped_sine_plan,
)

FS = 48000.0


def make_profile(stimulus: dict, *, bands=None, reference_hz=1000.0, **profile_keys):
    """A small low-pass profile (pass 100..8000 Hz, stop 12..24 kHz) with a given
    [stimulus] table."""
    if bands is None:
        bands = [{"kind": "pass", "label": "pass", "start_hz": 100.0, "stop_hz": 8000.0,
                  "min_db": -1.0, "max_db": 1.0},
                 {"kind": "stop", "label": "stop", "start_hz": 12000.0, "stop_hz": 24000.0, "max_db": -40.0}]
    prof = {"id": "test-lowpass", **profile_keys}
    if reference_hz is not None:
        prof["reference_hz"] = reference_hz
    return parse_profile({"schema": 1, "profile": prof, "band": bands, "stimulus": stimulus})


def synth_period(bins, amps, phases, n):
    """Independent synthesis: sum of cosines, evaluated directly (not via irfft)."""
    t = np.arange(n)
    return sum(a * np.cos(2 * np.pi * b * t / n + p) for b, a, p in zip(bins, amps, phases))


# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------
def test_snap_to_bins_modes():
    n, fs = 1000, 1000.0  # 1 Hz bins
    b, f = snap_to_bins([10.2, 10.7], fs, n)
    assert list(b) == [10, 11] and np.allclose(f, [10.0, 11.0])
    b, _ = snap_to_bins([10.2, 10.7], fs, n, mode="up")
    assert list(b) == [11, 11]
    b, _ = snap_to_bins([10.2, 10.7], fs, n, mode="down")
    assert list(b) == [10, 10]
    b, _ = snap_to_bins([10.2, 11.9, 12.0], fs, n, odd=True)
    assert list(b) == [11, 11, 13]  # 12.0 is halfway between 11 and 13; rint rounds half to even (m = 6)
    assert all(v % 2 == 1 for v in b)
    b, _ = snap_to_bins([12.0], fs, n, odd=True, mode="up")
    assert list(b) == [13]


def test_crest_factor_of_a_sine_is_sqrt2():
    # textbook: peak/RMS of a sine = sqrt(2)
    n = 4800
    x = np.sin(2 * np.pi * 10 * np.arange(n) / n)
    assert crest_factor(x) == pytest.approx(math.sqrt(2.0), rel=1e-9)


def test_schroeder_flat_formula_matches_general_form():
    # Schroeder 1970: flat spectrum phi_n = phi_1 - pi n (n-1) / N; the general form
    # with equal powers must reduce to it
    n = 37
    k = np.arange(1, n + 1)
    assert np.allclose(schroeder_phases(n), -np.pi * k * (k - 1) / n)
    assert np.allclose(schroeder_phases(n, np.ones(n)), -np.pi * k * (k - 1) / n)


def test_schroeder_crest_factor_dense_flat_grid():
    # Schroeder 1970 (REFERENCES.md): a flat Schroeder multitone on a dense grid has a
    # crest factor of about 1.7; zero phases give sqrt(2N) exactly (all cosines peak at
    # n = 0: peak N a, RMS a sqrt(N/2)).
    n_tones, n = 200, 8192
    bins = np.arange(1, n_tones + 1)
    amps = np.ones(n_tones)
    x = synth_period(bins, amps, schroeder_phases(n_tones), n)
    assert 1.6 < crest_factor(x) < 1.8
    x0 = synth_period(bins, amps, np.zeros(n_tones), n)
    assert crest_factor(x0) == pytest.approx(math.sqrt(2 * n_tones), rel=1e-9)


def test_iterative_reduction_beats_schroeder_on_sparse_log_grid():
    # REFERENCES.md (Guillaume et al. 1991): on sparse logarithmic grids Schroeder's
    # phases do much worse and iterative methods help.
    n = 16384
    f = 24.0 * 10 ** (np.arange(0, 37) / 12.0)          # 12 points per decade, 24 Hz .. 24 kHz
    bins, _ = snap_to_bins(f[f < FS / 2 * 0.99], FS, n, odd=True)
    bins = np.unique(bins)
    amps = np.ones(bins.size)
    phi_s = schroeder_phases(bins.size)
    cf_s = crest_factor(synth_period(bins, amps, phi_s, n))
    phi_i, method = reduce_crest_factor(bins, amps, phi_s, n)
    cf_i = crest_factor(synth_period(bins, amps, phi_i, n))
    assert method != "schroeder"
    assert cf_i < 0.85 * cf_s, (cf_i, cf_s)


# --------------------------------------------------------------------------------------
# multitone plans
# --------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def mt_plan() -> MultitonePlan:
    prof = make_profile({"method": "multitone", "points_per_decade": 12, "level_dbfs": -10.0,
                         "periods": 4, "transient_periods": 1})
    return plan_for_profile(prof, FS)


def test_multitone_tones_lie_exactly_on_bins(mt_plan):
    # DFT orthogonality: whole-cycle tones leave every other bin empty (to rounding)
    n = mt_plan.period_samples
    x = mt_plan.signal_period()
    spec = np.abs(np.fft.rfft(x)) / (n / 2)            # amplitude per bin
    off = np.ones(spec.size, dtype=bool)
    off[mt_plan.bins] = False
    assert np.max(spec[off]) < 1e-12 * np.min(mt_plan.amplitudes)
    assert np.allclose(spec[mt_plan.bins], mt_plan.amplitudes, rtol=1e-9)
    assert np.allclose(mt_plan.freq_hz, mt_plan.bins * FS / n, rtol=0, atol=1e-9)
    # an independent direct synthesis gives the same period
    direct = synth_period(mt_plan.bins, mt_plan.amplitudes, mt_plan.phases_rad, n)
    assert np.max(np.abs(direct - x)) < 1e-12
    # full signal: transient + measured periods, each identical
    sig = mt_plan.signal()
    assert sig.size == n * (mt_plan.periods + mt_plan.transient_periods)
    assert np.array_equal(sig.reshape(-1, n), np.tile(x, (mt_plan.periods + mt_plan.transient_periods, 1)))
    assert mt_plan.duration_s == pytest.approx(sig.size / FS)


def test_multitone_peak_is_the_level_and_never_above():
    for level in (-3.0, -12.0, -30.0):
        prof = make_profile({"method": "multitone", "points_per_decade": 6, "level_dbfs": level, "periods": 2})
        plan = plan_for_profile(prof, FS)
        peak = np.max(np.abs(plan.signal()))
        assert peak <= 10 ** (level / 20) * (1 + 1e-12)
        assert 20 * np.log10(peak) == pytest.approx(level, abs=1e-9)
        assert plan.crest_factor_db == pytest.approx(20 * np.log10(crest_factor(plan.signal_period())))


def test_multitone_edges_inside_their_bands_and_reference_included(mt_plan):
    df = FS / mt_plan.period_samples
    f = mt_plan.freq_hz
    labels = mt_plan.point_label
    # pass band 100..8000 Hz: its edges measured inside, within two (odd) bins
    lo = f[labels.index("band[0] (pass) start")]
    hi = f[labels.index("band[0] (pass) stop")]
    assert 100.0 <= lo < 100.0 + 2 * df
    assert 8000.0 - 2 * df < hi <= 8000.0
    lo_s = f[labels.index("band[1] (stop) start")]
    assert 12000.0 <= lo_s < 12000.0 + 2 * df
    # 24 kHz is Nyquist: not excitable, reported, and the band measured up to the top bin
    assert 24000.0 in mt_plan.uncovered_hz
    assert np.all(f < FS / 2)
    assert f.max() > FS / 2 - 2 * df
    # the reference frequency is a point (within a bin pair)
    assert np.min(np.abs(f - 1000.0)) <= df
    # ascending, unique
    assert np.all(np.diff(f) > 0)


def test_multitone_uncovered_frequencies_are_listed():
    bands = [{"kind": "pass", "start_hz": 20.0, "stop_hz": 18000.0, "min_db": -1.0, "max_db": 1.0},
             {"kind": "stop", "start_hz": 24000.0, "stop_hz": 90000.0, "max_db": -60.0}]
    prof = make_profile({"method": "multitone", "frequencies_hz": [50.0, 1000.0, 30000.0], "periods": 2},
                        bands=bands)
    plan = plan_for_profile(prof, FS)
    assert 30000.0 in plan.uncovered_hz and 90000.0 in plan.uncovered_hz and 24000.0 in plan.uncovered_hz
    assert np.all(plan.freq_hz < FS / 2)
    assert any("90000" in n or "24000..90000" in n for n in plan.notes)


def test_unexcited_lines_separate_even_order_distortion():
    # Design claim: tones on odd bins only, so any even-order product (sum or difference
    # of two odd bins, or a doubled bin) lands on an even bin. Pass the period through a
    # memoryless square law and look where the products go.
    prof = make_profile({"method": "multitone", "points_per_decade": 12, "periods": 2, "level_dbfs": -6.0})
    plan = plan_for_profile(prof, FS)
    n = plan.period_samples
    assert np.all(plan.bins % 2 == 1)
    x = plan.signal_period()
    y2 = np.abs(np.fft.rfft(x ** 2))
    odd = np.arange(y2.size) % 2 == 1
    assert np.max(y2[odd]) < 1e-9 * np.max(y2[~odd])
    # a cubic puts products on odd bins, and some of them are free (not excited)
    y3 = np.abs(np.fft.rfft(x ** 3)) / (n / 2)
    free_odd = np.setdiff1d(np.arange(1, n // 2, 2), plan.bins)
    assert free_odd.size > 0 and np.max(y3[free_odd]) > 1e-3 * np.max(np.abs(x)) ** 3
    assert set(plan.noise_bins) == set(range(1, n // 2)) - set(plan.bins)


def test_explicit_period_and_config_override():
    prof = make_profile({"method": "multitone", "points_per_decade": 3, "periods": 3, "transient_periods": 1,
                         "period_samples": 4096, "unexcited_lines": False})
    plan = plan_for_profile(prof, FS)
    assert plan.period_samples == 4096 and plan.periods == 3 and plan.transient_periods == 1
    assert plan.signal().size == 4 * 4096


def test_report_matches_monte_carlo_dft_scatter():
    # Cramer-Rao (Rife & Boorstyn 1974; Kay 1993): sigma_A/A = 1/sqrt(N SNR), so
    # sigma_gain_dB = 8.686/sqrt(N SNR) and sigma_phase = 1/sqrt(N SNR) rad; a DFT on
    # whole-cycle tones in white noise attains it. Check the report against the scatter
    # of DFT estimates over 400 noise realisations.
    plan = multitone_plan([1000.0, 3000.0, 7000.0], FS, level_dbfs=-20.0, periods=2, transient_periods=0,
                          period_samples=1024, optimize_phases=False)
    noise_dbfs = -60.0
    rep = plan.report(noise_dbfs)
    rng = np.random.default_rng(7)
    x = plan.signal()[plan.measured_start:]
    n = plan.period_samples
    trials = 400
    noisy = x[None, :] + 10 ** (noise_dbfs / 20) * rng.standard_normal((trials, x.size))
    spec = np.fft.rfft(noisy.reshape(trials, plan.periods, n), axis=-1).mean(axis=1)[:, plan.bins]
    g_db = 20 * np.log10(np.abs(spec))
    ph = np.angle(spec)
    assert np.allclose(np.std(g_db, axis=0), rep["u_gain_db"], rtol=0.2)
    assert np.allclose(np.degrees(np.std(ph, axis=0)), rep["u_phase_deg"], rtol=0.2)
    # with an equally noisy reference channel: sqrt(2) worse
    rep2 = plan.report(noise_dbfs, reference_noise_dbfs_rms=noise_dbfs)
    assert np.allclose(np.array(rep2["u_gain_db"]) / rep["u_gain_db"], math.sqrt(2), rtol=1e-9)
    assert rep["duration_s"] == pytest.approx(plan.duration_s)


def test_extra_samples_covers_latency_and_clock_stretch(mt_plan):
    extra = mt_plan.extra_samples(2000, max_clock_ppm=200.0)
    assert extra >= 2000 + 200e-6 * mt_plan.signal().size


def test_reference_beyond_nyquist_is_a_config_error():
    bands = [{"kind": "pass", "start_hz": 38000.0, "stop_hz": 42000.0, "min_db": -1.0, "max_db": 1.0}]
    prof = make_profile({"method": "multitone", "points_per_decade": 12}, bands=bands, reference_hz=40000.0)
    with pytest.raises(ConfigError, match="reference_hz"):
        plan_for_profile(prof, FS)


# --------------------------------------------------------------------------------------
# stepped sine
# --------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def ss_plan() -> SteppedSinePlan:
    prof = make_profile({"method": "stepped-sine", "points_per_decade": 4, "level_dbfs": -10.0,
                         "periods": 4, "cycles": 8, "min_tone_s": 0.004, "settle_s": 0.003})
    return plan_for_profile(prof, FS)


def test_stepped_sine_segments_hold_whole_cycles(ss_plan):
    sig = ss_plan.signal()
    assert sig.size == ss_plan.segments[-1][1]
    for k, (a, b) in enumerate(ss_plan.segments):
        f = ss_plan.freq_hz[k]
        cycles = f * (b - a) / FS
        assert abs(cycles - round(cycles)) < 1e-9 and round(cycles) >= 8
        assert (b - a) >= 0.004 * FS
        # the segment is the documented tone: amplitude cos(2 pi f i / fs + phase), global i
        i = np.arange(a, b)
        ref = ss_plan.amplitude * np.cos(2 * np.pi * f * i / FS + ss_plan.phases_rad[k])
        assert np.max(np.abs(sig[a:b] - ref)) < 1e-9
        # whole cycles: the segment's DFT holds one line only (no leakage)
        spec = np.abs(np.fft.rfft(sig[a:b]))
        j = int(round(cycles))
        spec[j] = 0.0
        assert np.max(spec) < 1e-9 * (b - a) * ss_plan.amplitude
        # settle part precedes the segment
        assert a - ss_plan.step_starts[k] == ss_plan.settle_samples == math.ceil(0.003 * FS)
    # the reference frequency (1000 Hz) is measured 4x longer (every relative gain uses it)
    j = ss_plan.point_kind.index("reference")
    a, b = ss_plan.segments[j]
    assert (b - a) >= 4 * 0.004 * FS and ss_plan.freq_hz[j] * (b - a) / FS >= 4 * 8 - 1e-9
    # frequencies moved by at most 1e-4 relative from their request, edges stay in band
    rel = np.abs(ss_plan.freq_hz / ss_plan.requested_hz - 1)
    assert np.all(rel[ss_plan.freq_hz < 0.49 * FS] <= 1e-4)
    lab = ss_plan.point_label
    assert 100.0 <= ss_plan.freq_hz[lab.index("band[0] (pass) start")] <= 100.0 * (1 + 1e-4)
    assert 8000.0 * (1 - 1e-4) <= ss_plan.freq_hz[lab.index("band[0] (pass) stop")] <= 8000.0


def test_stepped_sine_level_and_crest_factor(ss_plan):
    assert np.max(np.abs(ss_plan.signal())) <= 10 ** (-10 / 20) * (1 + 1e-12)
    assert ss_plan.crest_factor == pytest.approx(math.sqrt(2), rel=0.01)
    rep = ss_plan.report(-90.0)
    assert rep["method"] == "stepped-sine" and len(rep["u_gain_db"]) == ss_plan.freq_hz.size
    # CRB with N = the samples of the segment: 8.686 / sqrt(N SNR)
    n = np.array([b - a for a, b in ss_plan.segments])
    snr = ss_plan.amplitude ** 2 / (2 * 10 ** (-90 / 10))
    assert np.allclose(rep["u_gain_db"], 20 / np.log(10) / np.sqrt(n * snr))


def test_stepped_sine_plan_from_list_near_nyquist():
    plan = stepped_sine_plan([23970.0, 1000.0, 30000.0], FS, blocks=4, cycles=8, min_tone_s=0.002, settle_s=0.001)
    assert 30000.0 in plan.uncovered_hz
    assert plan.freq_hz.size == 2
    assert abs(plan.freq_hz[1] / 23970.0 - 1) < 1e-4
    assert plan.freq_hz[0] == 1000.0
