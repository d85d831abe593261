"""Board control over a serial port: the board's identity, filter mode and gain.

Many boards under test have a serial command port (a UART behind a USB adapter): they
report what they are and accept settings (filter mode, gain). A station declares it in
``[station.control]``; a profile may require settings with its ``[control]`` table
(``mode``, ``gain_db``) and may carry the product's board command map (``commands``, a
table or a file relative to the profile, same keys as below), which then replaces the
station's. `harness.measure.run_from_files` then reads the board's identity
into the certificate's ``unit`` and sets the required mode and gain before measuring;
a board that cannot be set is refused (exit 4, nothing measured).

Station file::

    [station.control]
    port = "/dev/ttyUSB0"     # or COM3, or any pyserial URL (loop://, socket://host:port, rfc2217://...)
    baud = 115200
    timeout_s = 1.0           # longest wait for one reply line
    line_ending = "\\n"       # sent after each command ("\\r\\n" or "\\r" if the board wants it)
    check_serial = true       # refuse when the board's serial differs from the unit's --serial
    commands = "board-commands.toml"   # a command-map file (relative to the station file) or a table:
    [station.control.commands]
    identity = "ID?"          # reply: the board model (or fields, see identity_pattern)
    serial = "SN?"
    firmware = "FW?"
    set_mode = "MODE {mode}"  # acknowledged by `ok`, then read back with get_mode
    get_mode = "MODE?"
    set_gain = "GAIN {gain_db}"
    get_gain = "GAIN?"
    ok = "OK"                 # acknowledgement of a setting
    error_prefix = "ERR"      # a reply starting with this is the board refusing
    modes = ["notch", "bypass"]   # accepted modes (optional)
    gain_range_db = [-12.0, 12.0] # accepted gains (optional)
    gain_tolerance_db = 0.05      # read-back must agree this well
    identity_pattern = '^(?P<manufacturer>[^,]+),(?P<model>.+)$'   # optional regexes that
    serial_pattern = '^[A-Z0-9-]+$'                                  # replies must match

Replies are lines (LF, CR LF accepted). Each must arrive complete within ``timeout_s``,
be printable ASCII, not be an echo of the command, and match its pattern; otherwise
`BoardControlError` (an `InvalidMeasurement`) names the port, the command and the
problem (silence, a partial line, garbage, the board's error reply, a read-back that
disagrees).
"""

from __future__ import annotations

import math
import re
import string
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from harness.config import Table, load_toml, sha256_hex
from harness.errors import InvalidMeasurement

MAX_LINE_BYTES = 256
_CONTROL_KEYS = ("port", "baud", "timeout_s", "line_ending", "check_serial", "commands")
_COMMAND_KEYS = ("identity", "serial", "firmware", "set_mode", "get_mode", "set_gain", "get_gain", "ok",
                 "error_prefix", "modes", "gain_range_db", "gain_tolerance_db", "identity_pattern",
                 "serial_pattern", "firmware_pattern", "schema", "name")
_PLACEHOLDERS = {"identity": (), "serial": (), "firmware": (), "set_mode": ("mode",), "get_mode": (),
                 "set_gain": ("gain_db",), "get_gain": ()}
LINE_ENDINGS = ("\n", "\r\n", "\r")


@dataclass(frozen=True)
class BoardCommands:
    """A validated board command map (see the module docstring)."""

    identity: str = "ID?"
    serial: str | None = None
    firmware: str | None = None
    set_mode: str | None = None
    get_mode: str | None = None
    set_gain: str | None = None
    get_gain: str | None = None
    ok: str = "OK"
    error_prefix: str = "ERR"
    modes: tuple[str, ...] = ()
    gain_range_db: tuple[float, float] | None = None
    gain_tolerance_db: float = 0.05
    patterns: dict = field(default_factory=dict)
    name: str = ""
    file: str | None = None
    sha256: str | None = None


@dataclass(frozen=True)
class SerialControlConfig:
    """The parsed ``[station.control]`` table."""

    port: str
    commands: BoardCommands
    baud: int = 115200
    timeout_s: float = 1.0
    line_ending: str = "\n"
    check_serial: bool = True
    station_id: str = ""


def parse_commands(data: dict, *, file: str | None = None, sha256: str | None = None,
                   path: str = "") -> BoardCommands:
    """Validate a board command map (a table, inline or from its own file)."""
    t = Table(data, file, path)
    t.check_known(_COMMAND_KEYS)
    vals: dict[str, Any] = {}
    for key, names in _PLACEHOLDERS.items():
        v = t.str(key, "ID?" if key == "identity" else None)
        if v is None:
            vals[key] = None
            continue
        if not v.strip() or "\n" in v or "\r" in v:
            raise t.error(key, "must be one command line (the line ending is added)")
        try:
            fields = [f for _, f, _, _ in string.Formatter().parse(v) if f is not None]
        except ValueError as exc:
            raise t.error(key, f"bad placeholder in {v!r}: {exc}") from None
        for f in fields:
            if re.split(r"[.\[!:]", f, maxsplit=1)[0] not in names:
                allowed = ", ".join("{" + n + "}" for n in names) or "none"
                raise t.error(key, f"unknown placeholder {{{f}}} in {v!r}; allowed here: {allowed}")
        if names and not fields:
            raise t.error(key, f"must contain {{{names[0]}}}")
        vals[key] = v
    for a, b in (("set_mode", "get_mode"), ("set_gain", "get_gain")):
        if (vals[a] is None) != (vals[b] is None):
            raise t.error(b if vals[b] is None else a, f"{a} and {b} go together (a setting is read back)")
    ok = t.str("ok", "OK")
    err = t.str("error_prefix", "ERR")
    if not ok.strip() or not err.strip():
        raise t.error("ok" if not ok.strip() else "error_prefix", "must not be empty")
    modes: tuple[str, ...] = ()
    if t.has("modes"):
        raw = t.data["modes"]
        if not isinstance(raw, list) or not raw or not all(isinstance(m, str) and m.strip() for m in raw):
            raise t.error("modes", "must be a non-empty array of mode names")
        modes = tuple(m.strip() for m in raw)
    rng = None
    if t.has("gain_range_db"):
        pair = t.float_list("gain_range_db")
        if len(pair) != 2 or not pair[0] < pair[1]:
            raise t.error("gain_range_db", "must be [lowest, highest] with lowest < highest")
        rng = (pair[0], pair[1])
    patterns = {}
    for key in ("identity_pattern", "serial_pattern", "firmware_pattern"):
        p = t.str(key, None)
        if p is not None:
            try:
                patterns[key.split("_")[0]] = re.compile(p)
            except re.error as exc:
                raise t.error(key, f"not a regular expression: {exc}") from None
    return BoardCommands(identity=vals["identity"], serial=vals["serial"], firmware=vals["firmware"],
                         set_mode=vals["set_mode"], get_mode=vals["get_mode"], set_gain=vals["set_gain"],
                         get_gain=vals["get_gain"], ok=ok.strip(), error_prefix=err.strip(), modes=modes,
                         gain_range_db=rng, gain_tolerance_db=t.float("gain_tolerance_db", 0.05, min=0.0),
                         patterns=patterns, name=t.str("name", ""), file=file, sha256=sha256)


def load_commands(path: str | Path) -> BoardCommands:
    """Load a board command-map TOML file (the keys of ``[station.control.commands]``
    at its top level)."""
    data, raw = load_toml(path)
    return parse_commands(data, file=str(path), sha256=sha256_hex(raw))


def parse_config(table: Table, *, base_dir: Path, station_id: str, backend: str) -> SerialControlConfig:
    """Validate ``[station.control]``; errors name the station file and key path."""
    table.check_known(_CONTROL_KEYS)
    port = table.str("port")
    if not port.strip():
        raise table.error("port", "must name a serial port (/dev/ttyUSB0, COM3) or a pyserial URL (loop://)")
    ending = table.str("line_ending", "\n")
    if ending not in LINE_ENDINGS:
        raise table.error("line_ending", 'must be "\\n", "\\r\\n" or "\\r"')
    cmds = BoardCommands() if not table.has("commands") else table.file_or_table(
        "commands", base_dir, load=load_commands, what="board command-map",
        parse=lambda raw, key: parse_commands(raw, file=table.file, path=key))
    return SerialControlConfig(port=port.strip(), commands=cmds,
                               baud=table.int("baud", 115200, min=50, max=20_000_000),
                               timeout_s=table.float("timeout_s", 1.0, min=0.01, max=120.0),
                               line_ending=ending, check_serial=table.bool("check_serial", True),
                               station_id=station_id)


# ======================================================================================
class BoardControlError(InvalidMeasurement):
    """The board did not answer as it must (names the port and the command)."""

    def __init__(self, port: str, command: str | None, reason: str):
        self.port, self.command = port, command
        super().__init__(reason)


def _show(data: bytes, n: int = 40) -> str:
    return repr(bytes(data[:n])) + ("..." if len(data) > n else "")


class BoardControl:
    """A board's serial command port.

    Parameters
    ----------
    config : SerialControlConfig
    port : serial.Serial-like, optional
        An already open port (anything with ``write``, ``read_until``,
        ``reset_input_buffer``, ``close`` and a ``timeout`` attribute), e.g. for
        tests; default: ``serial.serial_for_url(config.port, config.baud,
        timeout=config.timeout_s)`` on `open`.
    """

    def __init__(self, config: SerialControlConfig, *, port=None):
        self.config = config
        self.commands = config.commands
        self._port = port
        self._own = port is None

    # -- connection --------------------------------------------------------------------
    def open(self) -> "BoardControl":
        if self._port is not None:
            return self
        import serial

        try:
            self._port = serial.serial_for_url(self.config.port, baudrate=self.config.baud,
                                               timeout=self.config.timeout_s, write_timeout=self.config.timeout_s)
        except (serial.SerialException, ValueError, OSError) as exc:
            raise BoardControlError(self.config.port, None,
                                    f"board control: cannot open serial port {self.config.port}: {exc}") from None
        return self

    def close(self) -> None:
        if self._port is not None and self._own:
            try:
                self._port.close()
            except Exception:
                pass
        self._port = None

    def __enter__(self) -> "BoardControl":
        return self.open()

    def __exit__(self, *exc) -> None:
        self.close()

    def fail(self, command: str | None, problem: str) -> BoardControlError:
        where = f" to {command!r}" if command else ""
        return BoardControlError(self.config.port, command, f"board on {self.config.port}: {problem}{where}")

    # -- one exchange ------------------------------------------------------------------
    def exchange(self, command: str) -> str:
        """Send one command line and return its reply line, checked (module docstring)."""
        self.open()
        port = self._port
        try:
            port.reset_input_buffer()          # stale bytes must not pass for this reply
            port.write(command.encode("ascii") + self.config.line_ending.encode())
            try:
                port.flush()
            except Exception:
                pass
            raw = port.read_until(b"\n", MAX_LINE_BYTES + 2)
        except UnicodeEncodeError:
            raise self.fail(command, "the command is not ASCII") from None
        except Exception as exc:   # serial.SerialException, OSError (port gone)
            raise self.fail(command, f"serial I/O error ({exc})") from None
        t = self.config.timeout_s
        if not raw:
            raise self.fail(command, f"no reply within {t:g} s (silence)")
        if not raw.endswith(b"\n"):
            if len(raw) > MAX_LINE_BYTES:
                raise self.fail(command, f"reply longer than {MAX_LINE_BYTES} bytes without a line end: {_show(raw)}")
            raise self.fail(command, f"partial reply {_show(raw)} (no line end within {t:g} s)")
        body = raw.rstrip(b"\r\n")
        try:
            text = body.decode("ascii")
        except UnicodeDecodeError:
            raise self.fail(command, f"garbled reply {_show(raw)} (not ASCII text)") from None
        if any(not (32 <= ord(c) < 127 or c == "\t") for c in text):
            raise self.fail(command, f"garbled reply {_show(raw)} (control characters)")
        text = text.strip()
        if not text:
            raise self.fail(command, "empty reply line")
        if text == command.strip():
            raise self.fail(command, "the reply is the command itself (echo: a loopback, or the board echoes "
                                     "its input; turn echo off)")
        if text.upper().startswith(self.commands.error_prefix.upper()):
            raise self.fail(command, f"the board refused: {text!r}")
        return text

    def query(self, key: str, **values) -> str:
        cmd = self._command(key, **values)
        reply = self.exchange(cmd)
        pat = self.commands.patterns.get(key)
        if pat is not None and not pat.search(reply):
            raise self.fail(cmd, f"unexpected reply {reply!r} (does not match {key}_pattern {pat.pattern!r})")
        return reply

    def _command(self, key: str, **values) -> str:
        t = getattr(self.commands, key)
        if t is None:
            raise self.fail(None, f"the command map has no '{key}' command")
        return t.format(**values)

    def _set(self, key: str, **values) -> None:
        cmd = self._command(key, **values)
        reply = self.exchange(cmd)
        if reply.upper() != self.commands.ok.upper():
            raise self.fail(cmd, f"unexpected reply {reply!r} (expected {self.commands.ok!r})")

    # -- what the harness uses ---------------------------------------------------------
    def identity(self) -> dict:
        """``identity`` (named groups of identity_pattern merged in; else the whole
        reply is the model), ``serial`` and ``firmware`` when the map has them."""
        c = self.commands
        raw = self.query("identity")
        d: dict[str, Any] = {"identity": raw, "model": raw}
        pat = c.patterns.get("identity")
        if pat is not None:
            m = pat.search(raw)
            if m:
                d.update({k: v for k, v in m.groupdict().items() if v is not None})
        if c.serial:
            d["serial"] = self.query("serial")
        if c.firmware:
            d["firmware"] = self.query("firmware")
        d["port"] = self.config.port
        return d

    def mode(self) -> str:
        return self.query("get_mode")

    def set_mode(self, mode: str) -> None:
        """Select a filter mode and read it back."""
        c = self.commands
        if c.set_mode is None:
            raise self.fail(None, "the command map has no set_mode/get_mode commands; a mode cannot be set")
        if c.modes and mode not in c.modes:
            raise self.fail(None, f"mode {mode!r} is not one of the board's modes ({', '.join(c.modes)})")
        self._set("set_mode", mode=mode)
        back = self.mode()
        if back.lower() != mode.lower():
            raise self.fail(self._command("get_mode"), f"mode read back as {back!r} after setting {mode!r}")

    def gain_db(self) -> float:
        cmd = self._command("get_gain")
        reply = self.query("get_gain")
        m = re.fullmatch(r"\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*(?:dB)?\s*", reply)
        if not m:
            raise self.fail(cmd, f"unexpected reply {reply!r} (expected a gain in dB)")
        return float(m.group(1))

    def set_gain_db(self, gain_db: float) -> None:
        """Set the gain and read it back (within ``gain_tolerance_db``)."""
        c = self.commands
        if c.set_gain is None:
            raise self.fail(None, "the command map has no set_gain/get_gain commands; a gain cannot be set")
        g = float(gain_db)
        if not math.isfinite(g):
            raise self.fail(None, f"gain {gain_db!r} dB is not a number")
        if c.gain_range_db and not (c.gain_range_db[0] <= g <= c.gain_range_db[1]):
            raise self.fail(None, f"gain {g:g} dB is outside the board's range "
                                  f"{c.gain_range_db[0]:g}..{c.gain_range_db[1]:g} dB")
        self._set("set_gain", gain_db=g)
        back = self.gain_db()
        if abs(back - g) > c.gain_tolerance_db:
            raise self.fail(self._command("get_gain"), f"gain read back as {back:g} dB after setting {g:g} dB "
                                                       f"(tolerance {c.gain_tolerance_db:g} dB)")


# ======================================================================================
def prepare_board(station, profile, serial: str) -> dict:
    """What `harness.measure.run_from_files` does before measuring.

    With ``[station.control]``: read the board's identity, check its serial against
    `serial` (unless ``check_serial = false``), set the profile's required ``[control]``
    mode and gain, and return the unit facts for the certificate (``model``,
    ``firmware``, ``board_serial``, ``board_identity``, ``mode``, ``gain_db``,
    ``control_port``). Without it: {} when the profile requires nothing; a simulated
    station notes the requirement as not applied; any other station is refused.

    Raises
    ------
    BoardControlError (InvalidMeasurement, exit 4)
        The board does not answer properly or cannot be set; nothing is measured.
    """
    req = getattr(profile, "control", None)
    mode = getattr(req, "mode", None)
    gain = getattr(req, "gain_db", None)
    cfg = station.section("control")
    if cfg is None:
        if mode is None and gain is None:
            return {}
        if station.backend == "simulated":
            return {"board_settings": {"mode": mode, "gain_db": gain,
                                       "applied": False, "note": "simulated station without board control"}}
        raise InvalidMeasurement(f"profile {profile.id} requires board settings (mode {mode!r}, gain_db {gain!r}) "
                                 f"but station {station.id} has no [station.control] to set them; refused")
    if getattr(req, "commands", None) is not None:     # the product's own command map wins
        import dataclasses

        cfg = dataclasses.replace(cfg, commands=req.commands)
    with BoardControl(cfg) as board:
        ident = board.identity()
        sn = ident.get("serial")
        if cfg.check_serial and sn is not None and sn.strip() != str(serial).strip():
            raise BoardControlError(cfg.port, cfg.commands.serial,
                                    f"board on {cfg.port} reports serial {sn!r} but the unit was given as "
                                    f"{serial!r}; refused (set check_serial = false in [station.control] if "
                                    "the board's serial is not the unit's)")
        if mode is not None:
            board.set_mode(mode)
        if gain is not None:
            board.set_gain_db(gain)
        facts = {"model": ident.get("model"), "firmware": ident.get("firmware"), "board_serial": sn,
                 "board_identity": ident.get("identity"), "control_port": cfg.port}
        if ident.get("manufacturer"):
            facts["manufacturer"] = ident["manufacturer"]
        if cfg.commands.get_mode:
            facts["mode"] = board.mode()
        if cfg.commands.get_gain:
            facts["gain_db"] = board.gain_db()
        return facts
