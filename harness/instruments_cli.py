"""Command-line verbs for lab instruments and board control.

* ``harness instrument-server --device DUT.toml [--port 5025] ...`` runs the simulated
  generator + digitizer (`harness.instrument_server`) in the foreground.
* ``harness board-firmware --pty [--device DUT.toml] ...`` runs the simulated board
  firmware on a pseudo-terminal (`harness.board_firmware`).
* ``harness instruments-check --station STATION.toml`` connects to a station's
  instruments (``[station.visa]``) and board (``[station.control]``), prints their
  identities and error-queue state, and changes nothing else (exit 0 when everything
  answers, 4 when something does not).
"""

from __future__ import annotations

from harness.errors import EXIT_INVALID, EXIT_PASS, InvalidMeasurement


def _cmd_server(args) -> int:
    from harness.instrument_server import run_from_args

    return run_from_args(args)


def _cmd_firmware(args) -> int:
    from harness.board_firmware import run_from_args

    return run_from_args(args)


def _cmd_check(args) -> int:
    from harness.station import load_station

    station = load_station(args.station)
    ok = True
    if station.section("visa") is not None:
        from harness.backends.visa import open_backend

        backend = open_backend(station)
        try:
            ident = backend.identity()
        finally:
            backend.close()
        for role in ("generator", "digitizer"):
            d = ident.get(role, {})
            print(f"{role:<10} {d.get('resource')}: {d.get('idn') or '-'}")
        print(f"command map {ident['command_map'].get('file')} (sha256 {str(ident['command_map'].get('sha256'))[:12]})")
        if ident.get("error"):
            print(f"  problem: {ident['error']}")
            ok = False
    if station.section("control") is not None:
        from harness.control import BoardControl

        try:
            with BoardControl(station.section("control")) as board:
                ident = board.identity()
                extra = []
                if board.commands.get_mode:
                    extra.append(f"mode {board.mode()}")
                if board.commands.get_gain:
                    extra.append(f"gain {board.gain_db():g} dB")
            print(f"board      {ident['port']}: {ident.get('identity')}, serial {ident.get('serial', '-')}, "
                  f"firmware {ident.get('firmware', '-')}" + (f", {', '.join(extra)}" if extra else ""))
        except InvalidMeasurement as exc:
            print(f"board      problem: {exc.reason}")
            ok = False
    if station.section("visa") is None and station.section("control") is None:
        print(f"station {station.id} has neither [station.visa] nor [station.control]: nothing to check")
    return EXIT_PASS if ok else EXIT_INVALID


def register(sub) -> None:
    """Add ``instrument-server``, ``board-firmware`` and ``instruments-check``."""
    from harness import board_firmware, instrument_server

    srv = sub.add_parser("instrument-server",
                         help="run the simulated generator + digitizer (with a simulated board) over TCP",
                         description="Simulated lab instruments over TCP raw sockets (SCPI). Prints "
                                     "'READY generator=<resource> digitizer=<resource>' when listening.")
    instrument_server.add_arguments(srv)
    srv.set_defaults(func=_cmd_server)

    fw = sub.add_parser("board-firmware", help="run a simulated board firmware on a pseudo-terminal",
                        description="Simulated board firmware on a pseudo-terminal pair. Prints 'PTY <path>'.")
    board_firmware.add_arguments(fw)
    fw.set_defaults(func=_cmd_firmware)

    chk = sub.add_parser("instruments-check",
                         help="connect to a station's instruments and board and print their identities")
    chk.add_argument("--station", required=True, help="station TOML file")
    chk.set_defaults(func=_cmd_check)

