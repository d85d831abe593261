"""Benchmark 4: accuracy against the textbook H1 estimator on the same captures.

H1 = Pxy / Pxx (Bendat & Piersol, Random Data, from memory): cross- and auto-spectral
densities of the reference ``x`` and the response ``y`` by Welch averaging,
`scipy.signal.csd` and `scipy.signal.welch`. With ``nperseg`` = the multitone period,
the Welch grid holds the tone bins exactly, so H1 is read at the tones (no
interpolation). Two ways a textbook user would run it:

* "Hann 50 %": Hann window, 50 % overlap, over the whole capture as recorded (start-up
  transient, stream latency and the silent tail included);
* "boxcar, steady state": rectangular window, no overlap, over the measured periods only
  (located by cross-correlating the reference with the played signal,
  `scipy.signal.correlate`), the transient period skipped as the plan intends. With a
  noiseless reference this is algebraically the ratio of averaged spectra that
  `estimate_multitone` computes, so the ratio should be 1: a check of the comparison;
* "Hann, coarse grid": Hann window, 50 % overlap, ``nperseg`` = period / 8, the complex
  H1 interpolated linearly in frequency to the tones (what one gets from a Welch
  estimate whose grid does not match the excitation).

Our estimate: `harness.estimate.estimate_multitone` on the same capture. Truth:
`SimulatedBoard.true_response` (scipy.signal.sosfreqz of the board's sections with its
latency FIR). Errors: gain ``20 log10 |H / H_true|`` (dB) and phase
``angle(H / H_true)`` (deg), RMS over the points where the true gain is above -40 dB
(below it the noise, not the estimator, decides) and over the seeds. Board: the KD-8
DSP low-pass (fixtures/dut-dsp8k-sos.toml) with white output noise, KD-8 benchmark plan
(8192-sample periods, 1 transient + 8 measured periods, 23 tones).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal

from harness.backends.simulated import SimulatedBoard
from harness.estimate import estimate_multitone
from harness.stimulus import plan_for_profile

from .common import FS_48K, Row, kd8_model, kd8_profile, wrap_deg

BENCH = "4 Accuracy vs textbook H1"
NOISE_LEVELS_DBFS = (-60.0, -100.0)
CHAIN_LATENCY = 64
MIN_TRUE_GAIN_DB = -40.0
COARSE_FACTOR = 8


def h1_at_bins(x, y, n: int, bins, *, window: str, overlap: int) -> np.ndarray:
    """H1 = Pxy / Pxx (scipy.signal.csd / welch, ``nperseg = n``) at the given DFT bins."""
    kw = dict(fs=FS_48K, window=window, nperseg=n, noverlap=overlap, detrend=False, scaling="density")
    _, pxx = signal.welch(x, **kw)
    _, pxy = signal.csd(x, y, **kw)
    return pxy[bins] / pxx[bins]


def h1_interpolated(x, y, nperseg: int, freq_hz) -> np.ndarray:
    """H1 on a Welch grid of ``nperseg`` (Hann, 50 % overlap), complex values linearly
    interpolated to `freq_hz`."""
    kw = dict(fs=FS_48K, window="hann", nperseg=nperseg, noverlap=nperseg // 2, detrend=False)
    f, pxx = signal.welch(x, **kw)
    _, pxy = signal.csd(x, y, **kw)
    h = pxy / pxx
    return np.interp(freq_hz, f, h.real) + 1j * np.interp(freq_hz, f, h.imag)


def steady_state(x, y, plan):
    """The measured periods of both channels: the start by cross-correlation of the
    reference with the played signal, then the transient periods skipped."""
    s = plan.signal()
    c = signal.correlate(x, s, mode="valid", method="fft")
    lag = int(np.argmax(c))
    a = lag + plan.transient_periods * plan.period_samples
    b = a + plan.periods * plan.period_samples
    return x[a:b], y[a:b]


def _errors(h, h_true):
    r = np.asarray(h) / np.asarray(h_true)
    return 20 * np.log10(np.abs(r)), wrap_deg(np.degrees(np.angle(r)))


def run(*, seeds: int = 20, noise_levels_dbfs=NOISE_LEVELS_DBFS, seed: int = 1) -> dict:
    """Run benchmark 4.

    Parameters
    ----------
    seeds : int
        Captures per noise level.
    noise_levels_dbfs : sequence of float
        Output noise of the board, RMS dBFS.
    seed : int

    Returns
    -------
    dict
        ``rows`` and ``results`` (RMS errors per estimator and noise level).
    """
    prof = kd8_profile()
    plan = plan_for_profile(prof, FS_48K)
    n = int(plan.period_samples)
    bins = np.asarray(plan.bins)
    sig = plan.signal()
    extra = plan.extra_samples(4096)
    rows: list[Row] = []
    results: dict = {}
    for noise in noise_levels_dbfs:
        model = kd8_model(output_noise_dbfs=float(noise))
        err = {k: ([], []) for k in ("ours", "h1_hann", "h1_boxcar", "h1_coarse")}
        sel = None
        for t in range(seeds):
            board = SimulatedBoard(model, FS_48K, reference_channel=True,
                                   chain_latency_samples=CHAIN_LATENCY, seed=int(seed) * 104729 + t)
            cap = board.play_and_capture(sig, extra_samples=extra)
            h_true = board.true_response(plan.freq_hz)
            if sel is None:
                g = 20 * np.log10(np.abs(h_true))
                sel = g >= g.max() + MIN_TRUE_GAIN_DB
            est = estimate_multitone(plan, cap)
            x, y = cap.reference, cap.response
            xs, ys = steady_state(x, y, plan)
            cand = {
                "ours": est.h,
                "h1_hann": h1_at_bins(x, y, n, bins, window="hann", overlap=n // 2),
                "h1_boxcar": h1_at_bins(xs, ys, n, bins, window="boxcar", overlap=0),
                "h1_coarse": h1_interpolated(x, y, n // COARSE_FACTOR, plan.freq_hz),
            }
            for k, h in cand.items():
                eg, ep = _errors(h[sel], h_true[sel])
                err[k][0].append(eg)
                err[k][1].append(ep)
        rms = {k: {"gain_db": float(np.sqrt(np.mean(np.concatenate(v[0]) ** 2))),
                   "phase_deg": float(np.sqrt(np.mean(np.concatenate(v[1]) ** 2))),
                   "max_abs_gain_db": float(np.max(np.abs(np.concatenate(v[0])))),
                   "max_abs_phase_deg": float(np.max(np.abs(np.concatenate(v[1]))))}
               for k, v in err.items()}
        results[f"{noise:g}"] = {"rms": rms, "points_used": int(sel.sum()), "points": int(sel.size),
                                 "seeds": seeds}
        for variant, label in (("h1_hann", "H1 Hann"), ("h1_boxcar", "H1 boxcar steady"),
                               ("h1_coarse", "H1 coarse interp.")):
            for q, unit in (("gain_db", "dB"), ("phase_deg", "deg")):
                ours, ref = rms["ours"][q], rms[variant][q]
                rows.append(Row(BENCH, f"noise {noise:g}: RMS {q.split('_')[0]} err, vs {label}", ours, ref,
                                unit, ours / ref if ref > 0 else math.nan, "ours/H1"))
    return {"name": "h1", "rows": rows, "results": results,
            "settings": {"seeds": seeds, "noise_levels_dbfs": list(noise_levels_dbfs), "seed": seed,
                         "period_samples": n, "periods": int(plan.periods),
                         "transient_periods": int(plan.transient_periods), "tones": int(bins.size),
                         "chain_latency_samples": CHAIN_LATENCY, "min_true_gain_db": MIN_TRUE_GAIN_DB,
                         "coarse_nperseg": n // COARSE_FACTOR}}
