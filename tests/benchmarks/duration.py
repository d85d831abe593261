"""Benchmark 3: stimulus duration needed for U <= 0.05 dB at every point of a grid.

The grid: 12 points per decade from 20 Hz to 20 kHz at 48 kHz (37 points). The board:
an invented "KB" DSP board, a 2nd-order Butterworth high-pass at 5 Hz (digital, nearly
flat over the grid), with white output noise at a given level; the station has a
reference channel and no Type B (only the Type A part of U counts). Gains are absolute
(no reference frequency), so ``U = k u_A`` with the Student-t k of the estimator's dof.

For each method the shortest setting that MEETS the target is searched by running it:
a setting meets it when, in each of `repeats` seeded captures, the full analysis is
valid and ``U <= 0.05 dB`` at every grid point. Settings searched:

* multitone: the number of measured periods ``P`` (one transient period first), with
  the shortest period (5-smooth length) whose plan keeps every grid point (shorter
  periods merge the lowest grid points, which lie 4.2 Hz apart);
* stepped sine: ``min_tone_s`` (capture time per frequency) on a x1.25 ladder from
  2 ms, for each ``cycles`` in (4, 16) (minimum whole cycles per frequency; with 8
  blocks, 4 and 8 both mean one cycle per block), with the profile's defaults
  otherwise (8 blocks, the settling time derived from the mask).

Each ladder is searched from its short end (galloping, then bisection), which assumes that a longer setting of the same
knob never does worse (true of the expected U; a noisy run near the threshold can
break it, so the result is "a shortest setting found", not a proven minimum).
For comparison, `plan.report` (the Cramer-Rao prediction, with the Student-t k of the
plan's dof) gives the shortest setting it PREDICTS would meet the target.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.fft

from harness.analysis import analyze
from harness.backends.simulated import SimulatedBoard
from harness.stimulus import plan_for_profile
from harness.uncertainty import coverage_factor

from .common import FS_48K, Row, digital_board, profile_from_text, type_a_only_station

BENCH = "3 Duration for U <= 0.05 dB"
TARGET_U_DB = 0.05
NOISE_LEVELS_DBFS = (-60.0, -35.0)
MT_PERIODS = (2, 3, 4, 5, 6, 8, 10, 12, 16, 20, 24, 32, 40, 48, 64)
SS_CYCLES = (4, 16)
SS_MIN_TONE_S = tuple(0.002 * 1.25 ** j for j in range(33))     # 2 ms .. 2.5 s

PROFILE = """
schema = 1
[profile]
id = "bench-grid-20-20k"
title = "12 points per decade, 20 Hz..20 kHz"
revision = "b"
sample_rate_hz = 48000
[[band]]
kind = "pass"
start_hz = 20
stop_hz = 20000
min_db = -3
max_db = 3
[stimulus]
method = "{method}"
points_per_decade = 12
start_hz = 20
stop_hz = 20000
level_dbfs = -12
transient_periods = 1
periods = 8
{extra}
[decision]
rule = "guarded"
confidence = 0.95
"""


def _profile(method: str, **extra):
    lines = "\n".join(f"{k} = {v!r}" for k, v in extra.items())
    return profile_from_text(PROFILE.format(method=method, extra=lines), f"grid-{method}")


def board_model(noise_dbfs: float):
    return digital_board("butter", 2, 5.0, "highpass", FS_48K, output_noise_dbfs=float(noise_dbfs))


def measure(prof, plan, model, repeats: int, seed: int) -> dict:
    """Run `plan` `repeats` times; whether every run met the target, and the max U of each."""
    station = type_a_only_station()
    sig = plan.signal()
    extra = plan.extra_samples(512)
    max_u, ok = [], True
    for r in range(repeats):
        board = SimulatedBoard(model, FS_48K, reference_channel=True, chain_latency_samples=100,
                               seed=int(seed) * 7919 + r)
        a = analyze(prof, plan, board.play_and_capture(sig, extra_samples=extra), station)
        if a.gain is None or a.verdict == "invalid":
            max_u.append(float("inf"))
            ok = False
            break
        u = float(np.max(a.gain.expanded))
        max_u.append(u)
        if not u <= TARGET_U_DB:
            ok = False
            break                                  # one failing run decides
    return {"ok": ok, "max_U_db": max_u}


def predicted_max_u(plan, model, noise_dbfs: float, dof: float) -> float:
    """Largest ``k u`` over the grid that `plan.report` predicts (no run)."""
    gain = 20 * np.log10(np.abs(SimulatedBoard(model, FS_48K).true_response(plan.freq_hz)))
    rep = plan.report(noise_dbfs, gain_db=gain)
    return float(coverage_factor(dof) * max(rep["u_gain_db"]))


def _search(n: int, passes) -> int | None:
    """Smallest index i in 0..n-1 with passes(i), assuming monotone; None if none passes.

    Galloping search from the short end (0, 1, 3, 7, ...), then bisection: the long,
    slow settings are only run when the short ones fail."""
    if n <= 0:
        return None
    lo, i, step = -1, 0, 1                      # passes(lo) is False (lo = -1: none tried)
    while not passes(i):
        lo = i
        if i == n - 1:
            return None
        i = min(n - 1, i + step)
        step *= 2
    hi = i
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if passes(mid):
            hi = mid
        else:
            lo = mid
    return hi


def multitone_period(n_points: int, period_samples: int | None = None) -> tuple[int, object]:
    """The shortest 5-smooth period whose multitone plan keeps all `n_points` points
    (searched upward from the automatic period), or the plan for `period_samples`
    when given (which must keep them too)."""
    if period_samples is not None:
        plan = plan_for_profile(_profile("multitone", period_samples=int(period_samples)), FS_48K)
        if plan.freq_hz.size < n_points:
            raise ValueError(f"period_samples={period_samples} keeps {plan.freq_hz.size} of {n_points} grid points")
        return int(period_samples), plan
    prof = _profile("multitone")
    auto = plan_for_profile(prof, FS_48K)
    if auto.freq_hz.size >= n_points:
        return int(auto.period_samples), auto
    n = int(auto.period_samples)
    while n <= 4 * int(FS_48K):
        n = int(scipy.fft.next_fast_len(n + 2, real=True))
        if n % 2:
            continue
        plan = plan_for_profile(_profile("multitone", period_samples=n), FS_48K)
        if plan.freq_hz.size >= n_points:
            return n, plan
    raise RuntimeError("no multitone period up to 4 s keeps every grid point")


def run(*, noise_levels_dbfs=NOISE_LEVELS_DBFS, repeats: int = 3, seed: int = 1,
        mt_periods=MT_PERIODS, ss_cycles=SS_CYCLES, ss_min_tone_s=SS_MIN_TONE_S,
        period_samples: int | None = None) -> dict:
    """Run benchmark 3 (see the module docstring).

    Parameters
    ----------
    noise_levels_dbfs : sequence of float
        Output noise levels of the board (RMS dBFS); one search per level.
    repeats : int
        Seeded captures a setting must pass (all of them).
    seed : int
    mt_periods : sequence of int
        Multitone ladder: measured periods, ascending.
    ss_cycles, ss_min_tone_s : sequence
        Stepped-sine ladders: minimum cycles (one search each) and ``min_tone_s`` (s,
        ascending).
    period_samples : int, optional
        Multitone period; default: searched (see `multitone_period`).

    Returns
    -------
    dict
        ``rows`` and ``results`` (per noise level: the settings found, durations,
        the max U of each run, what plan.report predicted).
    """
    ss_default = plan_for_profile(_profile("stepped-sine"), FS_48K)
    n_points = int(ss_default.freq_hz.size)
    period, mt_base = multitone_period(n_points, period_samples)
    mt_prof = _profile("multitone", period_samples=period)
    mt_plans = [dataclasses.replace(mt_base, periods=int(p)) for p in mt_periods]
    ss_ladders = {}
    for cyc in ss_cycles:
        profs = [_profile("stepped-sine", cycles=int(cyc), min_tone_s=float(m)) for m in ss_min_tone_s]
        ss_ladders[int(cyc)] = (profs, [plan_for_profile(p, FS_48K) for p in profs])
    rows: list[Row] = []
    results: dict = {"grid_points": n_points, "multitone_period_samples": period, "levels": {}}
    for noise in noise_levels_dbfs:
        model = board_model(noise)
        tried: dict = {"multitone": {}, "stepped-sine": {}}

        # -- multitone: measured periods P (the same phases; dataclasses.replace only
        # changes how many periods are played) ----------------------------------------------

        def mt_pass(i):
            key = int(mt_periods[i])
            if key not in tried["multitone"]:
                tried["multitone"][key] = measure(mt_prof, mt_plans[i], model, repeats, seed)
            return tried["multitone"][key]["ok"]

        i_mt = _search(len(mt_plans), mt_pass)
        mt_pred = next((p for p in mt_plans
                        if predicted_max_u(p, model, noise, p.periods - 1) <= TARGET_U_DB), None)

        # -- stepped sine: (cycles, min_tone_s) ---------------------------------------------
        best_ss = None
        best_pred = None
        for cyc, (profs, plans) in ss_ladders.items():

            def ss_pass(i, cyc=cyc, profs=profs, plans=plans):
                key = (int(cyc), round(float(ss_min_tone_s[i]), 6))
                if key not in tried["stepped-sine"]:
                    tried["stepped-sine"][key] = measure(profs[i], plans[i], model, repeats, seed)
                return tried["stepped-sine"][key]["ok"]

            j = _search(len(plans), ss_pass)
            if j is not None and (best_ss is None or plans[j].duration_s < best_ss[2].duration_s):
                best_ss = (int(cyc), float(ss_min_tone_s[j]), plans[j])
            for m, p in zip(ss_min_tone_s, plans):
                if predicted_max_u(p, model, noise, p.blocks - 1) <= TARGET_U_DB:
                    if best_pred is None or p.duration_s < best_pred[2].duration_s:
                        best_pred = (int(cyc), float(m), p)
                    break

        mt_plan = mt_plans[i_mt] if i_mt is not None else None
        lev = {
            "noise_dbfs": noise,
            "multitone": None if mt_plan is None else {
                "periods": int(mt_plan.periods), "transient_periods": int(mt_plan.transient_periods),
                "period_samples": int(mt_plan.period_samples), "duration_s": mt_plan.duration_s,
                "points": int(mt_plan.freq_hz.size)},
            "multitone_predicted": None if mt_pred is None else {
                "periods": int(mt_pred.periods), "duration_s": mt_pred.duration_s},
            "stepped_sine": None if best_ss is None else {
                "cycles": best_ss[0], "min_tone_s": best_ss[1], "blocks": int(best_ss[2].blocks),
                "settle_s": float(best_ss[2].settle_s), "duration_s": best_ss[2].duration_s,
                "points": int(best_ss[2].freq_hz.size)},
            "stepped_sine_predicted": None if best_pred is None else {
                "cycles": best_pred[0], "min_tone_s": best_pred[1], "duration_s": best_pred[2].duration_s},
            "runs": {"multitone": {str(k): v for k, v in tried["multitone"].items()},
                     "stepped-sine": {f"cycles={k[0]},min_tone_s={k[1]}": v
                                      for k, v in tried["stepped-sine"].items()}},
        }
        results["levels"][f"{noise:g}"] = lev
        mt_d = lev["multitone"]["duration_s"] if lev["multitone"] else None
        ss_d = lev["stepped_sine"]["duration_s"] if lev["stepped_sine"] else None
        mt_pd = lev["multitone_predicted"]["duration_s"] if lev["multitone_predicted"] else None
        ss_pd = lev["stepped_sine_predicted"]["duration_s"] if lev["stepped_sine_predicted"] else None
        tag = f"noise {noise:g} dBFS"
        mt_set = f"(1+{lev['multitone']['periods']}) x {period}" if lev["multitone"] else "not reached"
        ss_set = (f"cycles {best_ss[0]}, {best_ss[1] * 1e3:.3g} ms" if best_ss else "not reached")
        rows.append(Row(BENCH, f"{tag}: multitone {mt_set}", mt_d, mt_pd, "s",
                        None if (mt_d is None or not mt_pd) else mt_d / mt_pd, "run/pred"))
        rows.append(Row(BENCH, f"{tag}: stepped sine {ss_set}", ss_d, ss_pd, "s",
                        None if (ss_d is None or not ss_pd) else ss_d / ss_pd, "run/pred"))
        rows.append(Row(BENCH, f"{tag}: multitone vs stepped sine", mt_d, ss_d, "s",
                        None if (mt_d is None or not ss_d) else mt_d / ss_d, "mt/ss"))
    return {"name": "duration", "rows": rows, "results": results,
            "settings": {"target_U_db": TARGET_U_DB, "repeats": repeats, "seed": seed,
                         "noise_levels_dbfs": list(noise_levels_dbfs), "mt_periods": list(mt_periods),
                         "ss_cycles": list(ss_cycles), "ss_min_tone_s": [float(v) for v in ss_min_tone_s],
                         "board": "KB 2nd-order Butterworth high-pass 5 Hz (digital, 48 kHz)"}}
