"""Measurement verbs of the command line: run, demo, calibrate, recompute.

Each verb is a thin wrapper over the Python API (`harness.measure`, `harness.demo`,
`harness.calibration`, `harness.certificate`).
"""

from __future__ import annotations

import sys
from pathlib import Path

from harness.errors import EXIT_FAIL, EXIT_PASS

SAFETY_NOTE = ("Caution: stimulus levels are limited to the station's max_output_dbfs. Keep monitoring "
               "speakers and headphones off the measurement outputs, and treat mains-powered boards "
               "under local electrical-safety rules.")


def _cmd_run(args) -> int:
    from harness.measure import run_from_files

    result = run_from_files(args.profile, args.station, args.serial, out_dir=args.out,
                            golden=getattr(args, "golden", None))
    print(format_unit_line(result))
    for r in result.reasons:
        print(f"  - {r}")
    print(f"  certificate: {result.json_path}")
    print(f"  report:      {result.html_path}")
    return result.exit_code


def _cmd_demo(args) -> int:
    from harness.demo import run_demo

    return run_demo(out_dir=Path(args.out), units=args.units, seed=args.seed, out=sys.stdout)


def _cmd_calibrate(args) -> int:
    from harness.calibration import calibrate_from_files

    cal, path = calibrate_from_files(args.station)
    print(f"calibration {cal['id']} of station {cal['station_id']}: {len(cal['freq_hz'])} points, "
          f"{cal['freq_hz'][0]:g}..{cal['freq_hz'][-1]:g} Hz")
    print(f"  chain gain {cal['summary']['gain_min_db']:+.3f} .. {cal['summary']['gain_max_db']:+.3f} dB, "
          f"largest u(gain) {cal['summary']['u_gain_max_db']:.4f} dB")
    print(f"  valid until {cal['due_utc']}")
    print(f"  written to {path}")
    return EXIT_PASS


def _cmd_recompute(args) -> int:
    from harness.certificate import recompute

    diffs = recompute(args.certificate, args.profile)
    if not diffs:
        print(f"{args.certificate}: every figure recomputes from the raw capture and the profile")
        return EXIT_PASS
    print(f"{args.certificate}: {len(diffs)} difference(s):")
    for d in diffs[:50]:
        print(f"  - {d}")
    return EXIT_FAIL


def format_unit_line(result) -> str:
    """One summary line for a measured unit."""
    w = result.worst
    if result.verdict == "invalid" or not w:
        worst = (result.reasons[0] if result.reasons else "no points measured")[:80]
    else:
        worst = f"worst {w['margin_db']:+.3f} dB at {w['frequency_hz']:.6g} Hz (U {w['U_gain_db']:.3f} dB)"
    return f"{result.serial:<22} {result.verdict.upper():<13} {worst}"


# Modules that add verbs of their own (each has ``register(subparsers)``); a module that
# is not installed is simply not offered.
VERB_MODULES = ("harness.audio_cli", "harness.instruments_cli", "harness.line_cli")


def register(sub) -> None:
    """Add the measurement verbs (and those of `VERB_MODULES`) to the top-level subparsers."""
    import importlib
    import importlib.util

    _register_core(sub)
    for name in VERB_MODULES:
        if importlib.util.find_spec(name) is not None:
            importlib.import_module(name).register(sub)


def _register_core(sub) -> None:
    run = sub.add_parser("run", help="measure one unit against a profile on a station",
                         epilog=SAFETY_NOTE)
    run.add_argument("profile", help="profile TOML file")
    run.add_argument("--station", required=True, help="station TOML file")
    run.add_argument("--serial", required=True, help="serial number of the unit")
    run.add_argument("--out", default=None,
                     help="folder for certificates (default: the station's output_dir, else ./harness-out)")
    run.add_argument("--golden", default=None, metavar="FILE",
                     help="golden-unit file: compare this unit (the golden unit) with its stored response; "
                          "a station that is not verified gives exit 4")
    run.set_defaults(func=_cmd_run)

    demo = sub.add_parser("demo", help="calibrate the built-in simulated station and measure a small lot",
                          epilog=SAFETY_NOTE)
    demo.add_argument("--out", default="harness-out", help="output folder (default ./harness-out)")
    demo.add_argument("--units", type=int, default=10, help="number of simulated boards (default 10)")
    demo.add_argument("--seed", type=int, default=2612, help="lot seed (default 2612)")
    demo.set_defaults(func=_cmd_demo)

    cal = sub.add_parser("calibrate", help="measure the measurement chain through a loopback",
                         epilog=SAFETY_NOTE)
    cal.add_argument("--station", required=True, help="station TOML file")
    cal.set_defaults(func=_cmd_calibrate)

    rc = sub.add_parser("recompute", help="recompute a certificate from its raw capture and profile")
    rc.add_argument("certificate", help="certificate JSON file")
    rc.add_argument("--profile", default=None,
                    help="profile TOML (default: the profile copy beside the certificate)")
    rc.set_defaults(func=_cmd_recompute)
