"""A simulated board firmware behind a serial port (a pseudo-terminal pair).

Run it as a separate process; it opens a pseudo-terminal pair (``os.openpty``), puts
the slave side in raw mode, prints ONE line with the slave's path and serves the
master side::

    python -m harness.board_firmware --pty [--device fixtures/dut-notch50-nominal.toml]
    PTY /dev/pts/7

A client opens ``/dev/pts/7`` as its serial port (``[station.control] port``).

Protocol (lines end with LF; CR LF accepted; replies end with CR LF)::

    ID?            -> "<manufacturer>,<model>"       (from --device or --manufacturer/--model)
    SN?            -> "<serial>"
    FW?            -> "<firmware>"
    MODE <name>    -> "OK", or "ERR 2 unknown mode <name>"
    MODE?          -> "<name>"
    GAIN <dB>      -> "OK" (the gain is rounded to --gain-step-db), or "ERR 3 gain out of range"
    GAIN?          -> "<dB>" (one decimal)
    anything else  -> "ERR 1 unknown command"

The settings are state only: this firmware does not change the simulated filter (an
instrument server simulates that board separately).

Misbehaviour (for the client's tests), on commands starting with ``--on`` (default: all):
``garbage`` (bytes that are not ASCII text), ``partial`` (a reply without its line end),
``silent`` (no reply), ``error`` ("ERR 9 simulated fault"), ``echo`` (the command
repeated back). ``--max-lifetime-s`` ends the process after that long.
"""

from __future__ import annotations

import argparse
import os
import select
import sys
import time
import tty

MISBEHAVIOURS = ("garbage", "partial", "silent", "error", "echo")


class Firmware:
    """The command interpreter (no I/O): `handle(line) -> reply bytes or None`."""

    def __init__(self, *, manufacturer: str, model: str, serial: str, firmware: str,
                 modes: list[str], gain_range_db: tuple[float, float] = (-12.0, 12.0),
                 gain_step_db: float = 0.1, misbehave: str | None = None, misbehave_on: str = ""):
        self.manufacturer, self.model, self.serial, self.firmware = manufacturer, model, serial, firmware
        self.modes = list(modes)
        self.mode = self.modes[0]
        self.gain_db = 0.0
        self.gain_range_db = gain_range_db
        self.gain_step_db = gain_step_db
        self.misbehave = misbehave
        self.misbehave_on = misbehave_on.upper()

    def _answer(self, cmd: str) -> str:
        word, _, arg = cmd.strip().partition(" ")
        word = word.upper()
        arg = arg.strip()
        if word == "ID?":
            return f"{self.manufacturer},{self.model}"
        if word == "SN?":
            return self.serial
        if word == "FW?":
            return self.firmware
        if word == "MODE?":
            return self.mode
        if word == "MODE":
            match = [m for m in self.modes if m.lower() == arg.lower()]
            if not match:
                return f"ERR 2 unknown mode {arg[:20]}"
            self.mode = match[0]
            return "OK"
        if word == "GAIN?":
            return f"{self.gain_db:.1f}"
        if word == "GAIN":
            try:
                g = float(arg)
            except ValueError:
                return "ERR 4 gain must be a number"
            lo, hi = self.gain_range_db
            if not lo <= g <= hi:
                return "ERR 3 gain out of range"
            self.gain_db = round(g / self.gain_step_db) * self.gain_step_db
            return "OK"
        return "ERR 1 unknown command"

    def handle(self, line: bytes) -> bytes | None:
        text = line.decode("ascii", "replace").strip()
        if not text:
            return None
        bad = self.misbehave is not None and text.upper().startswith(self.misbehave_on)
        if bad and self.misbehave == "silent":
            return None
        if bad and self.misbehave == "garbage":
            return b"\xff\xfe\x9c\x00\x81\n"
        if bad and self.misbehave == "error":
            return b"ERR 9 simulated fault\r\n"
        if bad and self.misbehave == "echo":
            return text.encode() + b"\r\n"
        reply = self._answer(text).encode("ascii", "replace")
        if bad and self.misbehave == "partial":
            return reply[: max(1, len(reply) // 2)]
        return reply + b"\r\n"


def serve_pty(fw: Firmware, *, max_lifetime_s: float = 0.0, out=sys.stdout) -> int:
    """Open a pseudo-terminal pair, print ``PTY <slave path>``, answer on the master."""
    master, slave = os.openpty()
    tty.setraw(slave)                    # no echo, no CR/LF translation on the client's side
    path = os.ttyname(slave)
    print(f"PTY {path}", file=out, flush=True)
    t_end = time.monotonic() + max_lifetime_s if max_lifetime_s > 0 else None
    buf = bytearray()
    try:
        while t_end is None or time.monotonic() < t_end:
            r, _, _ = select.select([master], [], [], 0.2)
            if not r:
                continue
            try:
                chunk = os.read(master, 4096)
            except OSError:              # EIO while no client has the slave open (Linux)
                time.sleep(0.05)
                continue
            buf.extend(chunk)
            while True:
                i = min([j for j in (buf.find(b"\n"), buf.find(b"\r")) if j >= 0], default=-1)
                if i < 0:
                    break
                line = bytes(buf[:i])
                del buf[:i + 1]
                reply = fw.handle(line)
                if reply:
                    os.write(master, reply)
    except KeyboardInterrupt:
        pass
    finally:
        os.close(master)
        os.close(slave)
    return 0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m harness.board_firmware",
                                description="Simulated board firmware on a pseudo-terminal (serial command port).")
    add_arguments(p)
    return run_from_args(p.parse_args(argv))


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--pty", action="store_true", required=True, help="serve on a new pseudo-terminal pair")
    p.add_argument("--device", default=None, help="device model TOML: model, firmware, manufacturer and id from it")
    p.add_argument("--manufacturer", default=None)
    p.add_argument("--model", default=None)
    p.add_argument("--serial", default=None, help="serial number (default: the device model's id, else SIM-0001)")
    p.add_argument("--firmware", default=None)
    p.add_argument("--modes", default="filter,bypass", help="comma-separated modes, the first is the start-up mode")
    p.add_argument("--gain-step-db", type=float, default=0.1)
    p.add_argument("--misbehave", choices=MISBEHAVIOURS, default=None)
    p.add_argument("--on", dest="misbehave_on", default="", help="command prefix the misbehaviour applies to")
    p.add_argument("--max-lifetime-s", type=float, default=0.0)


def run_from_args(args) -> int:
    man, model, serial, fwv = "Kestrel Instruments (invented)", "SIM-BOARD", "SIM-0001", "0.0.0"
    if args.device:
        from harness.device import load_device_model
        from harness.errors import HarnessError

        try:
            d = load_device_model(args.device)
        except HarnessError as exc:
            print(f"board-firmware: error: {exc}", file=sys.stderr)
            return exc.exit_code
        man, model, serial, fwv = d.manufacturer or man, d.model or model, d.id, d.firmware or fwv
    modes = [m.strip() for m in args.modes.split(",") if m.strip()] or ["filter"]
    fw = Firmware(manufacturer=args.manufacturer or man, model=args.model or model, serial=args.serial or serial,
                  firmware=args.firmware or fwv, modes=modes, gain_step_db=args.gain_step_db,
                  misbehave=args.misbehave, misbehave_on=args.misbehave_on)
    return serve_pty(fw, max_lifetime_s=args.max_lifetime_s)


if __name__ == "__main__":
    sys.exit(main())
