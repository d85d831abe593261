"""Command line of the benchmarks: ``python -m tests.benchmarks [--quick] [--json FILE]``.

Prints a fixed-width table (header: machine, versions, date) and optionally writes every
figure as JSON. Modes: full (default; the figures to quote), ``--quick`` (fewer trials,
about a minute) and ``--smoke`` (minimal counts for the test suite; its figures are only
sanity checks, not results).
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import sys
import tempfile
import time
from pathlib import Path

from . import MODULES
from .common import format_table, machine

# settings per mode and benchmark (keyword arguments of each module's run())
SETTINGS = {
    "full": {
        "crb": {"trials": 2000, "mt_trials": 400},
        "coverage": {"trials": 2000},
        "duration": {"noise_levels_dbfs": (-60.0, -35.0), "repeats": 3, "ss_cycles": (4, 16)},
        "h1": {"seeds": 20},
        "speed": {"repeats": 5},
        "store": {"units": 500, "points": 100, "stats_units": 100_000},
    },
    "quick": {
        "crb": {"trials": 300, "mt_trials": 40},
        "coverage": {"trials": 200},
        "duration": {"noise_levels_dbfs": (-60.0,), "repeats": 1, "ss_cycles": (4,)},
        "h1": {"seeds": 3},
        "speed": {"repeats": 2},
        "store": {"units": 100, "points": 100, "stats_units": 10_000},
    },
    "smoke": {
        "crb": {"trials": 200, "mt_trials": 15, "snrs_db": (60.0,)},
        "coverage": {"trials": 12},
        "duration": {"noise_levels_dbfs": (-60.0,), "repeats": 1, "mt_periods": (3,), "ss_cycles": (4,),
                     "ss_min_tone_s": (0.002,), "period_samples": 36000},
        "h1": {"seeds": 1, "noise_levels_dbfs": (-60.0,)},
        "speed": {"repeats": 1, "periods": 2},
        "store": {"units": 10, "points": 100, "stats_units": 300, "report": False},
    },
}


def run_all(mode: str, only=None, log=None) -> dict:
    """Run the benchmarks of `mode` (all, or those named in `only`); a JSON-friendly dict
    with the machine header, each benchmark's rows/results/settings and its run time."""
    header = machine()
    header["mode"] = mode
    out = {"header": header, "benchmarks": {}, "rows": []}
    t_all = time.perf_counter()
    for name in MODULES:
        if only and name not in only:
            continue
        mod = importlib.import_module(f"{__package__}.{name}")
        if log:
            log(f"running {name} ...")
        t0 = time.perf_counter()
        res = mod.run(**SETTINGS[mode][name])
        dt = time.perf_counter() - t0
        if log:
            log(f"  {name} took {dt:.1f} s")
        out["benchmarks"][name] = {"results": res["results"], "settings": _jsonable(res["settings"]),
                                   "seconds": dt, "rows": [r.to_dict() for r in res["rows"]]}
        out["rows"].extend(res["rows"])
    out["seconds"] = time.perf_counter() - t_all
    return out


def _jsonable(v):
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    return v


def write_json(path: str | Path, report: dict) -> None:
    """Write the report (without the Row objects) atomically."""
    from .common import _json_num

    data = {k: v for k, v in report.items() if k != "rows"}
    data["rows"] = [r.to_dict() for r in report["rows"]]
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=str(path.parent))
    with os.fdopen(fd, "w") as fh:
        json.dump(_json_num(data), fh, indent=1)
        fh.write("\n")
    os.replace(tmp, path)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.benchmarks",
                                 description="Benchmarks of the measurement engine (figures computed in this run).")
    g = ap.add_mutually_exclusive_group()
    g.add_argument("--quick", action="store_true", help="fewer trials (about a minute)")
    g.add_argument("--smoke", action="store_true", help="minimal counts (for the test suite; not results)")
    ap.add_argument("--json", metavar="FILE", help="also write every figure as JSON to FILE")
    ap.add_argument("--only", metavar="NAME", action="append", choices=MODULES,
                    help="run only this benchmark (repeatable): " + ", ".join(MODULES))
    args = ap.parse_args(argv)
    mode = "smoke" if args.smoke else "quick" if args.quick else "full"

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    report = run_all(mode, args.only, log)
    print(format_table(report["rows"], report["header"]))
    print(f"\ntotal time {report['seconds']:.1f} s")
    if args.json:
        write_json(args.json, report)
        print(f"figures written to {args.json}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
