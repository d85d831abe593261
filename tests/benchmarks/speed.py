"""Benchmark 5: analysis time and peak memory for a 10 s two-channel 96 kS/s capture.

The capture: a multitone (12 points per decade, 20 Hz..45 kHz, 1 s periods: one
transient + 9 measured periods = 10.0 s of stimulus) played through a simulated
digital board at 96 kHz (an invented "KB" board: 4th-order Butterworth low-pass at
16 kHz, 5 samples of latency, -90 dBFS output noise) on a station with a reference
channel. Building the plan and simulating the board are NOT timed: only what runs on
a capture that is already in memory.

Timed (wall clock, `time.perf_counter`, `repeats` runs of each after one warm-up run,
the two interleaved so both see the same machine load; the table gives the fastest run,
as `timeit` advises - slower runs measure other processes on the shared machine - and
the JSON every run and the median):

* `estimate_multitone(plan, capture)`;
* the full `analyze(profile, plan, capture, station)` (estimate + budget + mask +
  decision);
* the stages of `estimate_multitone`: one run under `cProfile`, the time spent in each
  function it calls directly, as a share of its total (profiling overhead included, so
  shares, not seconds, are the figure).

Peak memory: `tracemalloc` peak over one call (numpy registers its array buffers with
tracemalloc; scratch memory inside compiled FFT code is not seen), reported in MB and
as a multiple of the capture's own size (two float64 channels).
"""

from __future__ import annotations

import cProfile
import pstats
import statistics
import time
import tracemalloc

from harness.analysis import analyze
from harness.backends.simulated import SimulatedBoard
from harness.estimate import estimate_multitone
from harness.stimulus import plan_for_profile

from .common import Row, digital_board, profile_from_text, type_a_only_station

BENCH = "5 Analysis time, 2 x 96 kS/s"
FS = 96000.0
TARGET_FRACTION = 0.02

PROFILE = """
schema = 1
[profile]
id = "bench-96k"
title = "96 kHz DSP low-pass"
revision = "b"
sample_rate_hz = 96000
reference_hz = 1000
[[band]]
kind = "pass"
start_hz = 20
stop_hz = 10000
min_db = -0.5
max_db = 0.5
[[band]]
kind = "stop"
start_hz = 40000
stop_hz = 45000
max_db = -20
[stimulus]
method = "multitone"
points_per_decade = 12
start_hz = 20
stop_hz = 45000
level_dbfs = -10
period_samples = 96000
periods = {periods}
transient_periods = 1
[decision]
rule = "guarded"
confidence = 0.95
"""


def make_capture(seed: int = 1, periods: int = 9):
    """Profile, plan and a simulated capture of ``1 + periods`` seconds (10 s by
    default), with the time the simulation took."""
    prof = profile_from_text(PROFILE.format(periods=int(periods)), "96k")
    plan = plan_for_profile(prof, FS)
    model = digital_board("butter", 4, 16000.0, "lowpass", FS, output_noise_dbfs=-90.0, latency_samples=5.0)
    board = SimulatedBoard(model, FS, reference_channel=True, chain_latency_samples=256, seed=seed)
    t0 = time.perf_counter()
    cap = board.play_and_capture(plan.signal(), extra_samples=plan.extra_samples(1024))
    return prof, plan, cap, time.perf_counter() - t0


def _timed(fns, repeats: int) -> list[list[float]]:
    """Run each of `fns` once to warm up, then `repeats` rounds of all of them in turn;
    the times of each."""
    for fn in fns:
        fn()                                        # warm-up (imports, FFT plans)
    out: list[list[float]] = [[] for _ in fns]
    for _ in range(repeats):
        for i, fn in enumerate(fns):
            t0 = time.perf_counter()
            fn()
            out[i].append(time.perf_counter() - t0)
    return out


def _peak_bytes(fn) -> int:
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        base = tracemalloc.get_traced_memory()[0]
        fn()
        return int(tracemalloc.get_traced_memory()[1] - base)
    finally:
        tracemalloc.stop()


def _stages(fn, top: int = 6) -> list[dict]:
    """Share of the time of `estimate_multitone` spent in each function it calls directly."""
    pr = cProfile.Profile()
    pr.runcall(fn)
    st = pstats.Stats(pr)
    key = next(k for k in st.stats if k[2] == "estimate_multitone")
    total = st.stats[key][3]
    parts = []
    for k, (_, _, _, _, callers) in st.stats.items():
        if key in callers:
            parts.append((callers[key][3], k))
    parts.sort(reverse=True)
    return [{"function": k[2], "share": ct / total, "profiled_s": ct} for ct, k in parts[:top]]


def run(*, repeats: int = 5, seed: int = 1, periods: int = 9) -> dict:
    """Run benchmark 5 (see the module docstring).

    Parameters
    ----------
    repeats : int
        Timed runs (median reported), after one warm-up run.
    seed : int
    periods : int
        Measured 1 s periods after the 1 s transient period (9: a 10 s capture; fewer
        only for a smoke run).

    Returns
    -------
    dict
        ``rows`` and ``results`` (seconds of every run, best and median, fractions of
        the capture duration, peak memory, stage shares).
    """
    prof, plan, cap, sim_s = make_capture(seed, periods)
    station = type_a_only_station()
    dur = cap.response.size / cap.sample_rate_hz
    cap_bytes = cap.response.nbytes + (cap.reference.nbytes if cap.reference is not None else 0)
    t_est, t_an = _timed([lambda: estimate_multitone(plan, cap), lambda: analyze(prof, plan, cap, station)],
                         repeats)
    verdict = analyze(prof, plan, cap, station).verdict
    m_est = _peak_bytes(lambda: estimate_multitone(plan, cap))
    m_an = _peak_bytes(lambda: analyze(prof, plan, cap, station))
    stages = _stages(lambda: estimate_multitone(plan, cap))
    med_e, med_a = statistics.median(t_est), statistics.median(t_an)
    best_e, best_a = min(t_est), min(t_an)
    res = {
        "capture_duration_s": dur, "capture_samples": int(cap.response.size), "channels": 2,
        "sample_rate_hz": FS, "tones": int(plan.freq_hz.size), "verdict": verdict,
        "simulation_s": sim_s,
        "estimate_s": t_est, "estimate_median_s": med_e, "estimate_best_s": best_e,
        "estimate_fraction": best_e / dur, "estimate_fraction_median": med_e / dur,
        "analyze_s": t_an, "analyze_median_s": med_a, "analyze_best_s": best_a,
        "analyze_fraction": best_a / dur, "analyze_fraction_median": med_a / dur,
        "estimate_peak_mb": m_est / 1e6, "analyze_peak_mb": m_an / 1e6, "capture_mb": cap_bytes / 1e6,
        "estimate_stages": stages,
    }
    rows = [
        Row(BENCH, f"estimate_multitone: time / capture (best of {repeats})", best_e, dur, "s", best_e / dur,
            "fraction", "<= 0.02", bool(best_e / dur <= TARGET_FRACTION), extra={"median_s": med_e}),
        Row(BENCH, f"analyze (full): time / capture (best of {repeats})", best_a, dur, "s", best_a / dur,
            "fraction", "<= 0.02", bool(best_a / dur <= TARGET_FRACTION), extra={"median_s": med_a}),
        Row(BENCH, "estimate_multitone: peak memory / capture", m_est / 1e6, cap_bytes / 1e6, "MB",
            m_est / cap_bytes, "x capture"),
        Row(BENCH, "analyze (full): peak memory / capture", m_an / 1e6, cap_bytes / 1e6, "MB",
            m_an / cap_bytes, "x capture"),
    ]
    for s in stages:
        rows.append(Row(BENCH, f"  stage {s['function']} (share of estimate)", s["share"] * best_e, best_e, "s",
                        s["share"], "share"))
    return {"name": "speed", "rows": rows, "results": res,
            "settings": {"repeats": repeats, "seed": seed, "period_samples": int(plan.period_samples),
                         "periods": int(plan.periods), "transient_periods": int(plan.transient_periods),
                         "board": "KB 4th-order Butterworth low-pass 16 kHz, digital, 96 kHz"}}
