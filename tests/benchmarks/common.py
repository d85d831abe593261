"""Shared pieces of the benchmarks: machine facts, rows and the printed table, the
simulated boards and profiles they measure.

Everything here is plain data or a small builder; no figure is stored anywhere: every
number a benchmark reports is computed in the run that prints it.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import os
import platform
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy

from harness.analysis import StationFacts
from harness.device import DeviceModel, load_device_model, parse_device_model
from harness.profile import Profile, parse_profile
from harness.uncertainty import TypeB

ROOT = Path(__file__).resolve().parents[2]
FIXTURES = ROOT / "fixtures"
FS_48K = 48000.0
DB_PER_NEPER = 20.0 / math.log(10.0)     # 8.686 dB per unit relative amplitude change


# ======================================================================================
# machine and rows
# ======================================================================================
def machine() -> dict:
    """Facts about the machine and the software the figures were measured with."""
    try:
        load = os.getloadavg()
    except OSError:  # pragma: no cover - not on every platform
        load = (float("nan"),) * 3
    return {
        "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "os": f"{platform.system()} {platform.release()}",
        "machine": platform.machine(),
        "cpu_count": os.cpu_count(),
        "load_average_1min": round(load[0], 2),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
    }


@dataclass
class Row:
    """One line of the table.

    ``ratio`` is defined per row by ``ratio_is`` (for example ``"CRB/var"`` for an
    efficiency, ``"ours/H1"`` for an error ratio); ``target`` is a readable statement
    (empty when none exists) and ``met`` says whether this run met it (None: no target).
    """

    bench: str
    case: str
    measured: float
    reference: float | None
    unit: str
    ratio: float | None
    ratio_is: str
    target: str = ""
    met: bool | None = None
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {k: _json_num(v) for k, v in dataclasses.asdict(self).items()}


def _json_num(v):
    if isinstance(v, dict):
        return {str(k): _json_num(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_json_num(x) for x in v]
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if math.isfinite(v) else None
    if isinstance(v, np.ndarray):
        return _json_num(v.tolist())
    return v


def fmt(v: float | None, unit: str = "") -> str:
    """A number in 4 significant figures (scientific outside 1e-3..1e5), with its unit."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    a = abs(v)
    s = f"{v:.3e}" if (a and (a < 1e-3 or a >= 1e5)) else f"{v:.4g}"
    return f"{s} {unit}".rstrip()


COLUMNS = (("#", 3), ("case", 51), ("measured", 15), ("reference", 15), ("ratio", 19), ("target", 17),
           ("met", 3))


LEGEND = {
    "CRB/var": "efficiency = Cramer-Rao bound / empirical variance (1 ideal); met when >= 1 - 3 se, "
               "se = sqrt(2/(M-1)) for M trials",
    "x nominal": "coverage / 0.95",
    "x normal k": "mean coverage factor / 1.960 (normal k, infinite dof)",
    "x F(2,2P-4)": "false-alarm rate / the F-distribution rate for noise alone",
    "run/pred": "shortest duration found by running / shortest that plan.report predicts",
    "mt/ss": "multitone duration / stepped-sine duration",
    "ours/H1": "RMS error of estimate_multitone / RMS error of H1 (< 1: ours closer to the truth)",
    "fraction": "analysis wall time / capture duration",
    "x capture": "tracemalloc peak / size of the two captured channels",
    "share": "share of estimate_multitone's time (cProfile, direct callees)",
}


def format_table(rows: list[Row], header: dict) -> str:
    """Fixed-width table with a short header (machine, versions, date, run mode)."""
    lines = [
        "harness measurement-engine benchmarks",
        f"date {header['date_utc']}; {header['os']} {header['machine']}; cpu_count {header['cpu_count']} "
        f"(load {header['load_average_1min']}); Python {header['python']}, numpy {header['numpy']}, "
        f"scipy {header['scipy']}",
        f"mode: {header.get('mode', '?')}; every figure computed in this run (seeded trials)",
        "",
    ]
    head = " ".join(f"{name:<{w}}" for name, w in COLUMNS)
    lines += [head, "-" * len(head)]
    bench = None
    for i, r in enumerate(rows, 1):
        if r.bench != bench:
            bench = r.bench
            lines.append(f"[{bench}]")
        met = "" if r.met is None else ("yes" if r.met else "NO")
        ratio = "-" if r.ratio is None else f"{fmt(r.ratio)} {r.ratio_is}"
        cells = [i, r.case, fmt(r.measured, r.unit),
                 fmt(r.reference, r.unit) if r.reference is not None else "-", ratio, r.target, met]
        lines.append(" ".join(f"{str(c):<{w}}" for c, (_, w) in zip(cells, COLUMNS)).rstrip())
    used = [k for k in LEGEND if any(r.ratio_is == k for r in rows)]
    if used:
        lines += ["", "ratio:"] + [f"  {k:<12} {LEGEND[k]}" for k in used]
    return "\n".join(lines)


# ======================================================================================
# boards, profiles, station facts
# ======================================================================================
def profile_from_text(text: str, name: str) -> Profile:
    """A profile from TOML text (validated exactly as a profile file is)."""
    return parse_profile(tomllib.loads(text), file=f"<benchmark {name}>")


def type_a_only_station(min_snr_db: float = 20.0) -> StationFacts:
    """Station facts with every Type B component zero: only the Type A part counts."""
    return StationFacts("benchmark-station", True, TypeB(0.0, 0.0, 0.0), min_snr_db)


# KD-8 DSP low-pass (fixtures/dut-dsp8k-sos.toml): 4th-order Butterworth at 8 kHz for
# 48 kHz. Mask and plan as in tests/test_engine.py (KD8_PROFILE): pass 200..4000 Hz,
# stop 16..22 kHz, gains relative to 1 kHz, multitone of 8192-sample periods.
KD8_PROFILE = """
schema = 1
[profile]
id = "bench-kd8"
title = "KD-8 benchmark mask"
revision = "b"
sample_rate_hz = 48000
reference_hz = 1000
[[band]]
kind = "pass"
start_hz = 200
stop_hz = 4000
min_db = -0.5
max_db = 0.5
[[band]]
kind = "stop"
start_hz = 16000
stop_hz = 22000
max_db = -20
[stimulus]
method = "multitone"
points_per_decade = 10
start_hz = 200
stop_hz = 22000
level_dbfs = -10
periods = {periods}
transient_periods = 1
period_samples = 8192
[decision]
rule = "guarded"
confidence = 0.95
"""


def kd8_profile(periods: int = 8) -> Profile:
    return profile_from_text(KD8_PROFILE.format(periods=int(periods)), "kd8")


def kd8_model(**imperfections) -> DeviceModel:
    """The KD-8 fixture board with some imperfections replaced."""
    m = load_device_model(FIXTURES / "dut-dsp8k-sos.toml")
    return dataclasses.replace(m, imperfections=dataclasses.replace(m.imperfections, **imperfections))


def digital_board(family: str, order: int, cutoff_hz, btype: str, sample_rate_hz: float,
                  **imperfections) -> DeviceModel:
    """An invented digital board ("Kestrel KB bench board") from a scipy design."""
    cut = list(cutoff_hz) if isinstance(cutoff_hz, (list, tuple)) else float(cutoff_hz)
    data = {"device": {
        "id": f"KB-{family}{order}-{btype}",
        "model": "KB bench board (invented)",
        "filter": {"design": {"family": family, "order": int(order), "cutoff_hz": cut, "btype": btype,
                              "domain": "digital", "sample_rate_hz": float(sample_rate_hz)}},
        "imperfections": {k: v for k, v in imperfections.items()},
    }}
    return parse_device_model(data, file="<benchmark board>")


def wrap_deg(d):
    """Phase difference wrapped to [-180, 180) degrees."""
    return (np.asarray(d, dtype=float) + 180.0) % 360.0 - 180.0


def wrap_rad(d):
    """Phase difference wrapped to [-pi, pi) rad."""
    return (np.asarray(d, dtype=float) + np.pi) % (2 * np.pi) - np.pi
