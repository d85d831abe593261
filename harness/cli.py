"""Command line: a thin layer over the Python API.

Exit codes (DESIGN.md): 0 pass, 1 fail, 2 usage or configuration error,
3 inconclusive, 4 invalid measurement or hardware fault.
"""

from __future__ import annotations

import argparse
import sys

from harness import __version__
from harness.errors import EXIT_USAGE, HarnessError


def _cmd_profile_check(args) -> int:
    from harness.profile import describe_profile, load_profile

    profile = load_profile(args.file)
    print(describe_profile(profile))
    print("profile OK")
    return 0


def _cmd_design_check(args) -> int:
    from harness.design import run_design_check

    return run_design_check(args.profile, args.coeffs, quantize=args.quantize,
                            plot_path=args.plot, out=sys.stdout, points=args.points)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="harness",
        description="Filter compliance test harness: tolerance masks, measurement, "
                    "uncertainty, decisions and certificates.",
        epilog="Exit codes: 0 pass, 1 fail, 2 usage/configuration error, 3 inconclusive, "
               "4 invalid measurement or hardware fault.")
    p.add_argument("--version", action="version", version=f"harness {__version__}")
    sub = p.add_subparsers(dest="verb", metavar="VERB")

    prof = sub.add_parser("profile", help="work with product profiles")
    prof_sub = prof.add_subparsers(dest="profile_verb", metavar="ACTION")
    chk = prof_sub.add_parser("check", help="validate a profile and print its mask")
    chk.add_argument("file", help="profile TOML file")
    chk.set_defaults(func=_cmd_profile_check)

    dc = sub.add_parser("design-check", help="score a filter design (no hardware) against a profile's mask")
    dc.add_argument("profile", help="profile TOML file")
    dc.add_argument("coeffs", help="coefficients: JSON (sos, ba or zpk), CSV of sos rows, or .npz")
    dc.add_argument("--quantize", metavar="QM.N", default=None,
                    help="also score the coefficients rounded to fixed point Qm.n (for example Q1.15)")
    dc.add_argument("--plot", metavar="PNG", default=None,
                    help="where to write the Bode plot (default: next to the coefficients file, *.design.png)")
    dc.add_argument("--points", type=int, default=4000, metavar="N",
                    help="base grid size before refinement (default 4000)")
    dc.set_defaults(func=_cmd_design_check)

    from harness import commands  # measurement verbs: run, demo, calibrate

    commands.register(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    func = getattr(args, "func", None)
    if func is None:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        return int(func(args))
    except HarnessError as exc:
        print(f"harness: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("harness: interrupted", file=sys.stderr)
        return 130
