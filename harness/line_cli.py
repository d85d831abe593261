"""Verbs of the production line: line, stats, keys, verify (thin wrappers over
`harness.line`, `harness.stats`, `harness.signing`)."""

from __future__ import annotations

import sys
from pathlib import Path

from harness.errors import EXIT_FAIL, EXIT_PASS, ConfigError

LINE_EPILOG = ("Exit codes: 0 every unit passed, 1 at least one unit did not pass, 4 the line stopped for a "
               "station problem (calibration, golden unit, repeated invalid measurements, store), "
               "2 configuration error. Ctrl-C while waiting for a serial finishes the line; while a unit is "
               "measured, the first Ctrl-C finishes that unit and stops, a second one abandons it (recorded "
               "as abandoned). Caution: the station plays real signals; keep speakers and headphones off "
               "measurement outputs and handle mains-powered boards under your plant's safety rules.")


def _cmd_line(args) -> int:
    from harness.line import KeyboardSource, LineUI, ListSource, SerialPortSource, run_line

    if args.serials and args.scanner:
        raise ConfigError(None, "--serials", "give either --serials or --scanner, not both")
    ui = LineUI(json_lines=args.json)
    if args.serials:
        source = ListSource.from_file(args.serials)
    elif args.scanner:
        source = SerialPortSource(args.scanner, args.baud, out=ui.human)
    else:
        source = KeyboardSource()
    try:
        res = run_line(args.profile, args.station, source=source, ui=ui, out_dir=args.out, db=args.db,
                       lot=args.lot, work_order=args.work_order, operator=args.operator, retests=args.retests,
                       golden=args.golden, signing_key=args.signing_key, allow_duplicates=args.allow_duplicates,
                       max_units=args.max_units)
    finally:
        if hasattr(source, "close"):
            source.close()
    return res.exit_code


def _store_url(args) -> str:
    from harness.store import database_url

    if args.db:
        return database_url(None, ".", args.db)
    if args.station:
        from harness.station import load_station

        st = load_station(args.station)
        out = Path(args.out) if args.out else (st.output_dir or Path("harness-out"))
        return database_url(st.section("database"), out)
    return database_url(None, Path(args.out or "harness-out"))


def _cmd_stats(args) -> int:
    from harness.stats import run_stats

    return run_stats(_store_url(args), out=sys.stdout, profile_id=args.profile, lot=args.lot,
                     station_id=args.station_id, since=args.since, until=args.until, by=args.by,
                     frequency_hz=args.frequency, baseline=args.baseline, csv_path=args.csv,
                     junit_path=args.junit, report_dir=args.report, as_json=args.json)


def _cmd_keys_new(args) -> int:
    from harness.signing import new_keypair

    if bool(args.out) == bool(args.station):
        raise ConfigError(None, "--out", "give --out PATH (writes PATH.key and PATH.pub) or --station FILE "
                                         "(the key its [signing] section names)")
    if args.station:
        from harness.station import load_station

        st = load_station(args.station)
        cfg = st.section("signing")
        if cfg is None:
            raise ConfigError(args.station, "signing", "missing table [signing] with private_key = \"...\"")
        target = cfg.private_key
    else:
        target = Path(args.out)
    priv, pub, fp = new_keypair(target)
    print(f"private key: {priv}  (owner read/write only; back it up securely, never share it)")
    print(f"public key:  {pub}  (give it to customers and auditors)")
    print(f"fingerprint: {fp}  (SHA-256 of the raw public key; publish it)")
    return EXIT_PASS


def _cmd_keys_show(args) -> int:
    from harness.signing import fingerprint, load_public_key

    print(fingerprint(load_public_key(args.key)))
    return EXIT_PASS


def _cmd_verify(args) -> int:
    from harness.signing import verify_certificate

    res = verify_certificate(args.certificate, public_key=args.key, profile_path=args.profile,
                             require_signature=not args.allow_unsigned)
    if args.json:
        import json

        print(json.dumps({"certificate": args.certificate, "ok": res.ok, "checked": res.checked,
                          "problems": res.problems, "signature_fingerprint": res.signature.fingerprint,
                          "key_trusted": res.signature.trusted}, indent=1))
        return EXIT_PASS if res.ok else EXIT_FAIL
    if res.ok:
        print(f"{args.certificate}: VERIFIED")
        for c in res.checked:
            print(f"  ok  {c}")
        if not res.signature.trusted and res.signature.ok:
            print("  note: checked with the key embedded in the certificate; give --key STATION.pub (or compare "
                  "the fingerprint with the one the station published) to know who signed it")
        return EXIT_PASS
    print(f"{args.certificate}: NOT VERIFIED, {len(res.problems)} problem(s):")
    for p in res.problems[:60]:
        print(f"  - {p}")
    if len(res.problems) > 60:
        print(f"  ... and {len(res.problems) - 60} more")
    for c in res.checked:
        print(f"  ok  {c}")
    return EXIT_FAIL


def register(sub) -> None:
    ln = sub.add_parser("line", help="production line: scan, measure, record every attempt, show yield",
                        epilog=LINE_EPILOG)
    ln.add_argument("profile", help="profile TOML file")
    ln.add_argument("--station", required=True, help="station TOML file")
    ln.add_argument("--out", default=None, help="folder for certificates (default: the station's output_dir, "
                                                "else ./harness-out); the default SQLite store lives here")
    ln.add_argument("--db", default=None, metavar="URL",
                    help="results store: a SQLite file or a URL such as postgresql+psycopg://user@host/db "
                         "(default: the station's [database], else OUT/harness-results.sqlite)")
    ln.add_argument("--lot", default=None, help="lot identifier, recorded with every attempt")
    ln.add_argument("--work-order", default=None, help="work-order identifier")
    ln.add_argument("--operator", default=None, help="operator name")
    src = ln.add_argument_group("serial numbers (default: typed, or a keyboard-wedge barcode scanner)")
    src.add_argument("--serials", default=None, metavar="FILE",
                     help="unattended run: serial numbers from FILE, one a line ('-' for standard input)")
    src.add_argument("--scanner", default=None, metavar="PORT",
                     help="barcode scanner on a serial port (e.g. /dev/ttyACM0, COM3)")
    src.add_argument("--baud", type=int, default=9600, help="scanner baud rate (default 9600)")
    ln.add_argument("--retests", type=int, default=None,
                    help="retests allowed after a non-pass verdict (overrides the station and profile)")
    ln.add_argument("--golden", default=None, metavar="FILE", help="golden-unit check before the first unit")
    ln.add_argument("--signing-key", default=None, metavar="KEY",
                    help="sign certificates with this Ed25519 private key (overrides the station's [signing])")
    ln.add_argument("--allow-duplicates", action="store_true",
                    help="measure a serial that is already finished (e.g. after rework); flagged in the store")
    ln.add_argument("--max-units", type=int, default=None, help="stop after this many units")
    ln.add_argument("--json", action="store_true",
                    help="machine-readable: one JSON object per line on stdout (human text on stderr)")
    ln.set_defaults(func=_cmd_line)

    stp = sub.add_parser("stats", help="yield, first-pass yield, Cpk, drift; CSV / JUnit / PNG exports",
                         epilog="The store: --db URL, or the one --station FILE uses, or OUT/harness-results.sqlite "
                                "(--out, default ./harness-out). Times are UTC: 2026-05-20, 2026-05-20T14:00, -8h.")
    loc = stp.add_argument_group("which store")
    loc.add_argument("--db", default=None, metavar="URL", help="SQLite file or database URL")
    loc.add_argument("--station", default=None, metavar="FILE", help="the store this station file uses")
    loc.add_argument("--out", default=None, metavar="DIR", help="a line's output folder (its SQLite store)")
    flt = stp.add_argument_group("filters")
    flt.add_argument("--profile", default=None, metavar="ID", help="profile id")
    flt.add_argument("--lot", default=None)
    flt.add_argument("--station-id", default=None, metavar="ID", help="station id")
    flt.add_argument("--since", default=None, metavar="TIME")
    flt.add_argument("--until", default=None, metavar="TIME")
    stp.add_argument("--by", default="lot", choices=("lot", "station", "profile", "hour", "day", "week",
                                                     "operator", "work_order"),
                     help="yield table grouping (default lot)")
    stp.add_argument("--frequency", type=float, default=None, metavar="HZ",
                     help="control chart at this frequency (default: the lowest Cpk)")
    stp.add_argument("--baseline", type=int, default=25, metavar="N",
                     help="control limits from the first N units (default 25)")
    stp.add_argument("--csv", default=None, metavar="FILE", help="export every attempt as CSV")
    stp.add_argument("--junit", default=None, metavar="FILE", help="export JUnit XML (one test case per unit)")
    stp.add_argument("--report", default=None, metavar="DIR", help="write tables (CSV), JUnit XML and plots (PNG)")
    stp.add_argument("--json", action="store_true", help="print every figure as JSON")
    stp.set_defaults(func=_cmd_stats)

    keys = sub.add_parser("keys", help="station signing keys (Ed25519)")
    ksub = keys.add_subparsers(dest="keys_verb", metavar="ACTION")
    kn = ksub.add_parser("new", help="create a key pair: PATH.key (owner-only) and PATH.pub")
    kn.add_argument("--out", default=None, metavar="PATH", help="writes PATH.key and PATH.pub")
    kn.add_argument("--station", default=None, metavar="FILE", help="create the key the station's [signing] names")
    kn.set_defaults(func=_cmd_keys_new)
    ks = ksub.add_parser("fingerprint", help="print a key's fingerprint (SHA-256 of the raw public key)")
    ks.add_argument("key", help="public (.pub) or private (.key) key file")
    ks.set_defaults(func=_cmd_keys_show)

    vf = sub.add_parser("verify", help="verify a certificate: signature, raw-capture digest, every figure recomputed",
                        epilog="Exit codes: 0 verified, 1 a difference (each one named), 2 bad input.")
    vf.add_argument("certificate", help="certificate JSON file (its raw capture and profile copy beside it)")
    vf.add_argument("--key", default=None, metavar="PUBKEY",
                    help="the station's public key (without it the key embedded in the certificate is used)")
    vf.add_argument("--profile", default=None, metavar="FILE",
                    help="profile TOML (default: the profile copy beside the certificate)")
    vf.add_argument("--allow-unsigned", action="store_true", help="accept a certificate without a signature")
    vf.add_argument("--json", action="store_true", help="machine-readable result")
    vf.set_defaults(func=_cmd_verify)
