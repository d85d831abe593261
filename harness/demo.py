"""`harness demo`: the whole job on the built-in simulated station.

Calibrates the simulated chain through a loopback, builds a small lot of simulated
KI-A48 anti-alias boards (an invented product) with component spread, some out of
tolerance and one with a fault, measures each against profiles/aaf-48k.toml, writes a
certificate per unit and a lot summary into the output folder, and prints a summary.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import sys
import time
from pathlib import Path

import numpy as np

from harness.errors import ConfigError

ROOT = Path(__file__).resolve().parent.parent
DEMO_PROFILE = ROOT / "profiles" / "aaf-48k.toml"
DEMO_STATION = ROOT / "fixtures" / "station-demo.toml"

CAUTION = ("CAUTION: on real hardware the harness never plays above the station's max_output_dbfs; "
           "still keep speakers and headphones off measurement outputs (hearing damage), and handle "
           "mains-powered boards under your local electrical-safety rules and licensed practice.")


def _near_limit(nominal, f_check_hz: float, f_ref_hz: float, target_db: float, note: str,
                sample_rate_hz: float):
    """A copy of `nominal` with all its frequencies scaled (component drift) so that the
    simulated board's true gain at `f_check_hz` relative to `f_ref_hz` is `target_db`
    (root found with scipy.optimize.brentq)."""
    from scipy.optimize import brentq

    from harness.backends.simulated import SimulatedBoard
    from harness.device import _scale_filter

    def rel_db(scale):
        board = SimulatedBoard(dataclasses.replace(nominal, filter=_scale_filter(nominal.filter, scale, 1.0, 1.0)),
                               sample_rate_hz)
        h = board.true_response([f_check_hz, f_ref_hz])
        return 20 * np.log10(abs(h[0]) / abs(h[1])) - target_db

    scale = brentq(rel_db, 0.9, 1.1, xtol=1e-12)
    return dataclasses.replace(nominal, filter=_scale_filter(nominal.filter, scale, 1.0, 1.0),
                               note=f"{note} (all frequencies x{scale:.5f})")


def demo_lot(nominal, units: int, seed: int, *, stop_edge_hz: float | None = None,
             reference_hz: float = 1000.0, stop_ceiling_db: float = -60.0, sample_rate_hz: float = 192000.0):
    """The demo lot, deterministic for `seed`: spread units from the lot generator (two
    of them out of tolerance), two boards whose stop-band edge sits within the
    measurement uncertainty of the ceiling (one just inside, one just outside), and one
    board with an assembly fault. Serial numbers KA48-2612-0001 upwards."""
    from harness.device import generate_lot

    special = []
    if stop_edge_hz is not None and units >= 6:
        special.append((3, _near_limit(nominal, stop_edge_hz, reference_hz, stop_ceiling_db - 0.008,
                                       "drifted: stop-band edge 0.008 dB inside the ceiling", sample_rate_hz)))
        special.append((6, _near_limit(nominal, stop_edge_hz, reference_hz, stop_ceiling_db + 0.008,
                                       "drifted: stop-band edge 0.008 dB above the ceiling", sample_rate_hz)))
    if units >= 2:
        broken = dataclasses.replace(nominal, imperfections=dataclasses.replace(nominal.imperfections, fault="open"),
                                     note="assembly fault: output connector not soldered (open)")
        special.append((units - 1, broken))
    n_spread = units - len(special)
    spread_units = [m for _, m in generate_lot(nominal, n_spread, seed=seed, serial_prefix="lot",
                                               out_of_tolerance=min(2, max(n_spread - 1, 0)),
                                               spread={"cutoff_pct": 0.5, "oot_cutoff_pct": 6.0,
                                                       "oot_gain_db": 0.0})] if n_spread > 0 else []
    models = []
    special_at = dict(special)
    it = iter(spread_units)
    for i in range(units):
        models.append(special_at[i] if i in special_at else next(it))
    lot = []
    for i, m in enumerate(models, 1):
        serial = f"KA48-2612-{i:04d}"
        imp = dataclasses.replace(m.imperfections, seed=seed * 100 + i)
        lot.append((serial, dataclasses.replace(m, id=serial, imperfections=imp)))
    return lot


def run_demo(out_dir: Path, units: int = 10, seed: int = 2612, out=sys.stdout) -> int:
    """Run the demo; returns 0 when it completed (whatever the units' verdicts)."""
    from harness.backends.simulated import SimulatedBoard
    from harness.calibration import calibrate, load_calibration, loopback_device, write_calibration
    from harness.certificate import write_unique
    from harness.commands import format_unit_line
    from harness.device import load_device_model
    from harness.measure import measure_unit
    from harness.profile import load_profile
    from harness.station import CalibrationConfig, load_station

    if units < 1 or units > 500:
        raise ConfigError(None, "--units", f"must be between 1 and 500, got {units}")
    for f in (DEMO_PROFILE, DEMO_STATION):
        if not f.is_file():
            raise ConfigError(str(f), None, "demo file not found: run the demo from a checkout of the project")
    out_dir = Path(out_dir)
    profile = load_profile(DEMO_PROFILE)
    station = load_station(DEMO_STATION)
    station = dataclasses.replace(station, calibration=CalibrationConfig(out_dir / "cal" / f"{station.id}.json", 30))
    nominal = load_device_model(station.device_model)

    p = lambda *a: print(*a, file=out, flush=True)  # noqa: E731
    p(f"harness demo: {profile.title} (profile {profile.id} rev {profile.revision})")
    p(f"station {station.id}: simulated, {station.sample_rate_hz / 1000:g} kS/s, reference channel, "
      f"max output {station.max_output_dbfs:g} dBFS")
    p(CAUTION)
    p("")

    # 1. chain calibration through a loopback
    p("1. calibrating the chain through a loopback ...")
    through = SimulatedBoard(loopback_device(station.sample_rate_hz), station.sample_rate_hz,
                             reference_channel=station.reference_channel,
                             chain_latency_samples=station.chain_latency_samples, seed=seed)
    cal_doc = calibrate(station, through)
    cal_path = write_calibration(station, cal_doc)
    cal, cal_info = load_calibration(station)
    p(f"   {cal_doc['id']}: chain gain {cal_doc['summary']['gain_min_db']:+.4f} .. "
      f"{cal_doc['summary']['gain_max_db']:+.4f} dB over {cal_doc['freq_hz'][0]:g}..{cal_doc['freq_hz'][-1]:g} Hz, "
      f"due {cal_doc['due_utc']}  ({cal_path})")

    # 2. the lot
    from harness.stimulus import plan_for_profile

    plan = plan_for_profile(profile, station.sample_rate_hz)
    stop = next(b for b in profile.mask.bands if b.kind == "stop")
    edge = float(min(f for f in plan.freq_hz if f >= stop.start_hz))
    lot = demo_lot(nominal, units, seed, stop_edge_hz=edge, reference_hz=profile.mask.reference_hz,
                   stop_ceiling_db=stop.max_db, sample_rate_hz=station.sample_rate_hz)
    p(f"2. measuring {len(lot)} simulated KI-A48 boards: {profile.stimulus.method}, {len(plan.freq_hz)} points, "
      f"{plan.duration_s:.2f} s of stimulus per board")
    results = []
    t0 = time.perf_counter()
    for i, (serial, model) in enumerate(lot, 1):
        board = SimulatedBoard(model, station.sample_rate_hz, reference_channel=station.reference_channel,
                               chain_latency_samples=station.chain_latency_samples, seed=seed * 1000 + i)
        t = time.perf_counter()
        res = measure_unit(profile, station, serial, backend=board, out_dir=out_dir,
                           unit={"model": model.model, "firmware": model.firmware},
                           calibration=None, calibration_info=cal_info, plan=plan)
        results.append((res, model))
        p(f"   [{i:>2}/{len(lot)}] {format_unit_line(res)}  ({time.perf_counter() - t:.1f} s)")
    elapsed = time.perf_counter() - t0

    # 3. summary
    counts = {v: sum(1 for r, _ in results if r.verdict == v) for v in ("pass", "fail", "inconclusive", "invalid")}
    p("")
    p("3. lot summary")
    p(f"   {'serial':<16} {'verdict':<13} {'worst margin':>13} {'at Hz':>9} {'U dB':>7}  first reason / note")
    rows = []
    for r, model in results:
        w = r.worst
        reason = r.reasons[0] if r.reasons else ""
        rows.append({"serial": r.serial, "verdict": r.verdict,
                     "worst_margin_db": None if w is None else w["margin_db"],
                     "worst_frequency_hz": None if w is None else w["frequency_hz"],
                     "U_gain_db": None if w is None else w["U_gain_db"],
                     "reason": reason, "simulated_note": model.note or "",
                     "certificate": r.json_path.name, "report": r.html_path.name})
        wm = f"{w['margin_db']:+.3f} dB" if w else "-"
        wf = f"{w['frequency_hz']:.6g}" if w else "-"
        wu = f"{w['U_gain_db']:.3f}" if w else "-"
        short = reason if len(reason) <= 70 else reason[:69] + "\u2026"
        p(f"   {r.serial:<16} {r.verdict.upper():<13} {wm:>13} {wf:>9} {wu:>7}  {short}")
    p("")
    p(f"   pass {counts['pass']}, fail {counts['fail']}, inconclusive {counts['inconclusive']}, "
      f"invalid {counts['invalid']} of {len(results)} boards; {elapsed:.1f} s measuring")
    summary = {"profile": {"id": profile.id, "revision": profile.revision, "sha256": profile.sha256},
               "station": station.id, "calibration": cal_info, "seed": seed, "counts": counts, "units": rows}
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
    js = write_unique(out_dir, f"lot-summary_{stamp}", ".json",
                      json.dumps(summary, indent=1, sort_keys=True).encode())
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=list(rows[0].keys()))
    w.writeheader()
    w.writerows(rows)
    cs = write_unique(out_dir, f"lot-summary_{stamp}", ".csv", buf.getvalue().encode())
    p(f"   certificates (JSON + HTML + raw capture) and the summary are in {out_dir}/")
    p(f"   summary: {js.name}, {cs.name}")
    p(f"   open one report, e.g. {results[0][0].html_path}")
    return 0
