"""Benchmark 1: estimator efficiency against the Cramer-Rao bound.

A tone of known frequency in white Gaussian noise,
``x[n] = A cos(w0 n + phi) + e[n]``, ``e ~ N(0, sigma^2)``, ``n = 0..N-1``. The
Cramer-Rao bounds for amplitude and phase (Rife & Boorstyn, IEEE Trans. Inf. Theory
20(5), 1974; Kay, Fundamentals of Statistical Signal Processing I, 1993; REFERENCES.md):

    var(A_hat) >= 2 sigma^2 / N,        var(phi_hat) >= 2 sigma^2 / (A^2 N),

with ``SNR = A^2 / (2 sigma^2)`` per sample. Efficiency = CRB / empirical variance
(1.0 is ideal; the empirical variance over M trials has a relative standard error of
about sqrt(2 / (M - 1)), so the efficiency does too).

Estimators measured:

* ``sine_fit_3`` (IEEE Std 1057 three-parameter fit; the offset is a third unknown,
  which costs nothing at this many cycles);
* ``estimate_multitone`` per tone, (a) against the known digital stimulus (no reference
  channel) and (b) with a reference channel 60 dB quieter than the response. The device
  is a wire (h = 1), so ``|h| - 1`` is the relative amplitude error and ``angle(h)``
  the phase error of the tone; the bound uses the samples of the measured periods
  (``N = periods * period_samples``: the transient period is discarded by design).
  The per-tone variances are pooled over the tones (equal amplitudes, so equal bounds);
  the spread of the per-tone efficiencies is in the JSON.
"""

from __future__ import annotations

import math

import numpy as np

from harness.backends.base import Capture
from harness.estimate import estimate_multitone, sine_fit_3
from harness.stimulus import multitone_plan

from .common import FS_48K, Row, wrap_rad

BENCH = "1 Cramer-Rao efficiency"
SNRS_DB = (20.0, 40.0, 60.0, 80.0)
FIT_SAMPLES = 1024
FIT_FREQ_HZ = 1234.5          # 26.34 cycles in 1024 samples at 48 kHz: not on a DFT bin
MT_PERIOD = 4096
MT_PERIODS = 8
MT_TONES_HZ = tuple(float(f) for f in np.geomspace(300.0, 15000.0, 12))


def _efficiency(err_amp_rel: np.ndarray, err_phase: np.ndarray, n: int, snr: float) -> dict:
    """Efficiencies from relative amplitude errors and phase errors (rad) of trials.

    With the amplitude normalised to 1, both bounds are ``1 / (N SNR)``."""
    crb = 1.0 / (n * snr)
    v_a = float(np.var(err_amp_rel, ddof=1))
    v_p = float(np.var(err_phase, ddof=1))
    return {"crb_rel_var": crb, "var_amp_rel": v_a, "var_phase_rad2": v_p,
            "eff_amp": crb / v_a, "eff_phase": crb / v_p,
            "bias_amp_rel": float(np.mean(err_amp_rel)), "bias_phase_rad": float(np.mean(err_phase)),
            "eff_rel_se": math.sqrt(2.0 / (err_amp_rel.size - 1))}


def sine_fit_trials(snr_db: float, trials: int, seed: int) -> dict:
    """Empirical amplitude / phase variance of `sine_fit_3` against the bound."""
    rng = np.random.default_rng([seed, int(snr_db * 10)])
    snr = 10.0 ** (snr_db / 10.0)
    amp = 0.5
    sigma = amp / math.sqrt(2.0 * snr)
    n = np.arange(FIT_SAMPLES)
    w = 2.0 * np.pi * FIT_FREQ_HZ / FS_48K
    ea, ep = np.empty(trials), np.empty(trials)
    for t in range(trials):
        phi = rng.uniform(-np.pi, np.pi)
        x = amp * np.cos(w * n + phi) + sigma * rng.standard_normal(FIT_SAMPLES)
        a_hat, p_hat, _, _ = sine_fit_3(x, FIT_FREQ_HZ, FS_48K)
        ea[t] = a_hat / amp - 1.0
        ep[t] = wrap_rad(p_hat - phi)
    out = _efficiency(ea, ep, FIT_SAMPLES, snr)
    out.update(n_samples=FIT_SAMPLES, trials=trials)
    return out


def make_plan():
    """The multitone of the efficiency runs (12 log-spaced tones, 300 Hz..15 kHz)."""
    return multitone_plan(list(MT_TONES_HZ), FS_48K, level_dbfs=-12.0, periods=MT_PERIODS,
                          transient_periods=1, period_samples=MT_PERIOD)


def multitone_trials(plan, snr_db: float, trials: int, seed: int, *, reference: bool) -> dict:
    """Per-tone efficiency of `estimate_multitone` (wire device, white noise on the response;
    with `reference`, the reference channel carries noise 60 dB below the response's)."""
    rng = np.random.default_rng([seed, int(snr_db * 10), int(reference)])
    snr = 10.0 ** (snr_db / 10.0)
    amp = np.asarray(plan.amplitudes, dtype=float)
    sigma = float(amp[0]) / math.sqrt(2.0 * snr)
    s = plan.signal()
    extra = plan.extra_samples(0)
    clean = np.concatenate([s, np.zeros(extra)])
    k = amp.size
    ea, ep = np.empty((trials, k)), np.empty((trials, k))
    failures = 0
    for t in range(trials):
        y = clean + sigma * rng.standard_normal(clean.size)
        r = clean + 1e-3 * sigma * rng.standard_normal(clean.size) if reference else None
        try:
            est = estimate_multitone(plan, Capture(response=y, reference=r, sample_rate_hz=FS_48K))
        except Exception:                      # counted and reported, never hidden
            failures += 1
            ea[t], ep[t] = np.nan, np.nan
            continue
        ea[t] = np.abs(est.h) - 1.0
        ep[t] = wrap_rad(np.angle(est.h))
    ok = np.all(np.isfinite(ea), axis=1)
    n = MT_PERIODS * MT_PERIOD
    crb = 1.0 / (n * snr)
    m = int(ok.sum())
    # per-tone variances about each tone's own mean, pooled over the tones
    v_a = np.var(ea[ok], axis=0, ddof=1)
    v_p = np.var(ep[ok], axis=0, ddof=1)
    out = {"crb_rel_var": crb, "var_amp_rel": float(np.mean(v_a)), "var_phase_rad2": float(np.mean(v_p)),
           "eff_amp": crb / float(np.mean(v_a)), "eff_phase": crb / float(np.mean(v_p)),
           "bias_amp_rel": float(np.mean(ea[ok])), "bias_phase_rad": float(np.mean(ep[ok])),
           "eff_rel_se": math.sqrt(2.0 / (k * (m - 1))),
           "n_samples": n, "trials": trials, "failed_trials": failures, "tones": k,
           "per_tone_eff_amp": [float(v) for v in crb / v_a], "per_tone_eff_phase": [float(v) for v in crb / v_p]}
    return out


def run(*, trials: int = 2000, mt_trials: int = 400, snrs_db=SNRS_DB, seed: int = 1) -> dict:
    """Run benchmark 1.

    Parameters
    ----------
    trials : int
        Trials per SNR for `sine_fit_3`.
    mt_trials : int
        Trials per SNR and variant for the multitone estimator (each pools 12 tones).
    snrs_db : sequence of float
        Per-sample SNRs ``A^2 / (2 sigma^2)`` in dB.
    seed : int

    Returns
    -------
    dict
        ``rows`` (list of `Row`) and ``results`` (per estimator and SNR).
    """
    rows: list[Row] = []
    results: dict = {"sine_fit_3": {}, "multitone_digital": {}, "multitone_reference": {}}
    plan = make_plan()
    for snr_db in snrs_db:
        key = f"{snr_db:g}"
        results["sine_fit_3"][key] = sine_fit_trials(snr_db, trials, seed)
        results["multitone_digital"][key] = multitone_trials(plan, snr_db, mt_trials, seed, reference=False)
        results["multitone_reference"][key] = multitone_trials(plan, snr_db, mt_trials, seed, reference=True)
    labels = {"sine_fit_3": "sine_fit_3",
              "multitone_digital": "multitone, known stim.",
              "multitone_reference": "multitone, quiet ref."}
    for name, per in results.items():
        for key, r in per.items():
            for q, unit, sd, eff in (("gain", "dB", _sd_db(r["var_amp_rel"]), r["eff_amp"]),
                                     ("phase", "deg", math.degrees(math.sqrt(r["var_phase_rad2"])), r["eff_phase"])):
                ref_sd = _sd_db(r["crb_rel_var"]) if q == "gain" else math.degrees(math.sqrt(r["crb_rel_var"]))
                # an efficient estimator: 1 within 3 standard errors of the variance estimate
                rows.append(Row(BENCH, f"{labels[name]}: {q} sd, SNR {key} dB", sd, ref_sd, unit,
                                eff, "CRB/var", "1 (3se)", bool(eff >= 1.0 - 3.0 * r["eff_rel_se"]),
                                extra={"trials": r["trials"], "eff_rel_se": r["eff_rel_se"]}))
    return {"name": "crb", "rows": rows, "results": results,
            "settings": {"trials": trials, "mt_trials": mt_trials, "snrs_db": list(snrs_db), "seed": seed,
                         "fit_samples": FIT_SAMPLES, "fit_freq_hz": FIT_FREQ_HZ, "mt_period": MT_PERIOD,
                         "mt_periods": MT_PERIODS, "mt_tones_hz": [float(f) for f in plan.freq_hz]}}


def _sd_db(rel_var: float) -> float:
    """Standard deviation in dB of a gain whose relative variance is `rel_var`."""
    return 20.0 / math.log(10.0) * math.sqrt(rel_var)
