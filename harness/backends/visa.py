"""Lab instruments over VISA: a waveform generator and a two-channel digitizer.

The generator drives the board; the digitizer captures the board output on its response
channel (CH1) and the generator output straight back on its reference channel (CH2), so
both channels share the digitizer's clock and the generator's clock offset cancels in
``H = Y / U`` (it is still estimated and reported by `harness.estimate`).

What each instrument is told comes from a command map (TOML, see `load_command_map` and
``fixtures/visa-commands-sim.toml``): SCPI strings with named placeholders, so a bench
with other instruments needs a new map, not new code.

Station file::

    [station]
    backend = "visa"
    sample_rate_hz = 48000
    full_scale_volts = 1.0          # generator volts (peak) that correspond to 0 dBFS
    max_output_dbfs = -3.0          # or max_output_volts; checked before any level is set
    [station.visa]
    generator = "TCPIP::192.168.1.20::5025::SOCKET"
    digitizer = "TCPIP::192.168.1.21::5025::SOCKET"
    commands = "visa-commands-mybench.toml"   # relative to the station file (or an inline table)
    visa_library = "@py"            # pyvisa-py; "" for the system VISA library
    timeout_s = 2.0                 # longest wait for any reply
    acquisition_timeout_s = 5.0     # allowed beyond the capture's own duration
    transfer_bytes_per_s = 1e6      # slowest block transfer rate allowed for
    stepped_sine = "native"         # native (sine mode, one capture per step) | arbitrary

Measurement sequence
--------------------
Opening (first use): device clear, the map's ``reset`` commands (``*RST``, ``*CLS``),
``*OPC?``, ``*IDN?``, and the error queue read until ``0``. Every setting command is
followed by an error-queue query (``SYSTem:ERRor?``), so an entry names the command
that caused it.

`VisaBackend.play_and_capture` (multitone, or any stimulus as one arbitrary waveform):
level check; generator output off, arbitrary setup, upload of the waveform normalised
to its peak as one definite-length block, select, amplitude ``2 * peak *
full_scale_volts`` Vpp, offset 0; digitizer configured for ``len(stimulus) +
extra_samples`` points and armed on the generator's trigger; generator output on,
trigger; digitizer ``*OPC?`` (timeout: capture duration + ``acquisition_timeout_s``);
both channels fetched as blocks of exactly the expected byte count; output off.

`VisaBackend.measure_steps` (a `harness.stimulus.SteppedSinePlan` with ``stepped_sine =
"native"``): the generator in sine mode at the plan's amplitude; per step: frequency,
``*OPC?``, one immediate capture of both channels (settling included), fetched as
blocks. The steps are assembled into ONE capture laid out as the plan's continuous
signal would be captured, which `harness.estimate.estimate_stepped_sine` then reads
unchanged:

* a four-parameter fit (`harness.estimate.sine_fit_4`, IEEE Std 1057) of the reference
  channel of every step gives the digitizer-vs-generator clock ratio ``alpha``
  (weighted as the estimator weights it); step k is placed at
  ``round(step_start_k * alpha)``, as a continuous capture on the digitizer clock
  would hold it;
* each step's data start at the sample where the reference tone has the phase the plan
  gives the start of that step (a rising zero crossing, found by a three-parameter fit,
  `sine_fit_3`), so the correlation with the plan's signal finds every step where
  it belongs; response and reference are cut at the same sample, so their ratio is
  untouched;
* every sample in the assembled capture is a captured sample (nothing is interpolated
  or invented); the offsets are kept in ``capture.metadata``.

Why our own block reads: a binary block is read as ``#``, one digit ``n``, ``n`` length
digits, then exactly that many bytes with the read termination switched off, then the
terminator. pyvisa's ``read_binary_values`` would do much the same, but reading it
ourselves (1) never stops at a LF byte inside float data, (2) compares the declared
byte count with the count the acquisition must produce BEFORE reading the data, so a
wrong length or a garbled header is reported as such rather than as a timeout or a
misparsed array, and (3) gives each read a timeout sized to the block.

Failures (timeouts, garbled replies, error-queue entries, dropped connections, a block
of the wrong size) raise `InstrumentError` (an `InvalidMeasurement`) naming the
instrument (role, resource, model) and the command; `harness.measure.measure_unit` turns
it into an ``invalid`` certificate. Nothing waits without a timeout.
"""

from __future__ import annotations

import math
import re
import socket
import string
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from harness.backends.base import Capture, assert_level
from harness.config import Table, load_toml, sha256_hex
from harness.errors import ConfigError, InvalidMeasurement, LevelLimitError

SCHEMA = 1
STEPPED_MODES = ("native", "arbitrary")
BLOCK_FORMATS = {"float32-le": "<f4", "float32-be": ">f4", "int16-le": "<i2", "int16-be": ">i2", "int8": "i1"}
MAX_ERROR_ENTRIES = 32          # error-queue entries read after one command at most
PLACEMENT_MAX_PPM = 250.0       # clock offsets beyond this are not placed (the estimator's limit too)

# placeholders allowed in each command-map key (values supplied by the backend)
_COMMON = {"reset": (), "identify": (), "opc": (), "error": ()}
_GEN_KEYS = dict(_COMMON, **{
    "output_off": (), "output_on": (),
    "amplitude": ("amplitude_vpp", "amplitude_vpeak"),
    "offset": ("offset_v",),
    "arb_setup": ("sample_rate_hz", "points", "name"),
    "arb_upload": ("name", "points", "block"),
    "arb_select": ("name", "points", "sample_rate_hz"),
    "trigger": (),
    "sine_setup": (),
    "frequency": ("frequency_hz",),
})
_GEN_REQUIRED = ("identify", "opc", "error", "output_off", "output_on", "amplitude", "arb_setup",
                 "arb_upload", "arb_select", "trigger")
_GEN_OTHER = ("max_points", "waveform_name", "block_format")
_DIG_KEYS = dict(_COMMON, **{
    "configure": ("sample_rate_hz", "samples", "duration_s", "range_vpp"),
    "arm_triggered": ("sample_rate_hz", "samples"),
    "arm_immediate": ("sample_rate_hz", "samples"),
    "fetch": ("channel",),
})
_DIG_REQUIRED = ("identify", "opc", "error", "configure", "arm_triggered", "fetch")
_DIG_OTHER = ("max_points", "block_format", "volts_per_code", "response_channel", "reference_channel")
_MAP_TOP = ("schema", "name", "description", "generator", "digitizer")
_VISA_KEYS = ("generator", "digitizer", "commands", "visa_library", "timeout_s", "acquisition_timeout_s",
              "transfer_bytes_per_s", "stepped_sine", "read_termination", "write_termination")


# ======================================================================================
# command maps
# ======================================================================================
@dataclass(frozen=True)
class CommandMap:
    """A validated command map.

    Attributes
    ----------
    generator, digitizer : dict
        Key -> list of command templates (a single string becomes a one-item list).
    generator_options, digitizer_options : dict
        ``max_points``, ``waveform_name``, ``block_format``, ``volts_per_code``,
        ``response_channel``, ``reference_channel``.
    file, sha256, name : provenance (for the certificate).
    """

    generator: dict
    digitizer: dict
    generator_options: dict
    digitizer_options: dict
    name: str = ""
    file: str | None = None
    sha256: str | None = None

    def has_native_sine(self) -> bool:
        return bool(self.generator.get("sine_setup")) and bool(self.generator.get("frequency")) \
            and bool(self.digitizer.get("arm_immediate"))

    def describe(self) -> dict:
        return {"name": self.name, "file": self.file, "sha256": self.sha256}


def _placeholders(template: str) -> list[str]:
    try:
        return [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        raise ValueError(str(exc)) from None


def _commands(t: Table, allowed: dict, required: tuple, other: tuple, role: str) -> tuple[dict, dict]:
    t.check_known(tuple(allowed) + other)
    out: dict[str, list[str]] = {}
    for key, names in allowed.items():
        if not t.has(key):
            if key in required:
                raise t.error(key, f"missing key (the {role} needs it)")
            continue
        v = t.data[key]
        items = [v] if isinstance(v, str) else v
        if not isinstance(items, list) or not all(isinstance(s, str) for s in items):
            raise t.error(key, "must be a command string or an array of command strings")
        for i, s in enumerate(items):
            if "\n" in s or "\r" in s:
                raise t.error(key, "a command must not contain line breaks (the terminator is added)")
            try:
                fields = _placeholders(s)
            except ValueError as exc:
                raise t.error(key, f"bad placeholder in {s!r}: {exc}") from None
            for f in fields:
                base = re.split(r"[.\[!:]", f, maxsplit=1)[0]
                if base not in names:
                    hint = f"; allowed here: {', '.join('{' + n + '}' for n in names)}" if names else \
                        "; this command takes no placeholders"
                    raise t.error(key, f"unknown placeholder {{{f}}} in {s!r}{hint}")
            if key == "arb_upload":
                if fields.count("block") != 1 or not s.rstrip().endswith("{block}"):
                    raise t.error(key, "must contain {block} exactly once, at the end (the binary block is "
                                       "the last parameter)")
        if key == "arb_upload" and len(items) != 1:
            raise t.error(key, "must be one command")
        out[key] = list(items)
    opts: dict[str, Any] = {}
    if "max_points" in other:
        opts["max_points"] = t.int("max_points", 16 * 1024 * 1024, min=2)
    if "waveform_name" in other:
        name = t.str("waveform_name", "HARNESS")
        if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]{0,11}", name):
            raise t.error("waveform_name", "must be a letter followed by up to 11 letters, digits or '_'")
        opts["waveform_name"] = name
    if "block_format" in other:
        fmts = list(BLOCK_FORMATS) if role == "digitizer" else [k for k in BLOCK_FORMATS if k != "int8"]
        opts["block_format"] = t.str("block_format", "float32-le", choices=fmts)
    if "volts_per_code" in other:
        vpc = t.float("volts_per_code", None, min=0.0, min_exclusive=True)
        if not opts["block_format"].startswith("float") and vpc is None:
            raise t.error("volts_per_code", f"missing key (block_format {opts['block_format']} returns codes)")
        opts["volts_per_code"] = vpc
    if "response_channel" in other:
        opts["response_channel"] = t.int("response_channel", 1, min=0, max=64)
        opts["reference_channel"] = t.int("reference_channel", 2, min=0, max=64)
        if opts["response_channel"] == opts["reference_channel"]:
            raise t.error("reference_channel", "must differ from response_channel")
    return out, opts


def parse_command_map(data: dict, *, file: str | None = None, sha256: str | None = None,
                      path: str = "") -> CommandMap:
    """Validate a command-map mapping (see `load_command_map`)."""
    top = Table(data, file, path)
    top.check_known(_MAP_TOP)
    if top.has("schema"):
        schema = top.int("schema")
        if schema != SCHEMA:
            raise top.error("schema", f"unsupported schema {schema}; this harness reads schema {SCHEMA}")
    gen, gen_opts = _commands(top.table("generator"), _GEN_KEYS, _GEN_REQUIRED, _GEN_OTHER, "generator")
    dig, dig_opts = _commands(top.table("digitizer"), _DIG_KEYS, _DIG_REQUIRED, _DIG_OTHER, "digitizer")
    return CommandMap(gen, dig, gen_opts, dig_opts, name=top.str("name", ""), file=file, sha256=sha256)


def load_command_map(path: str | Path) -> CommandMap:
    """Load a command-map TOML file.

    Format (every command is a string or an array of strings sent in order; ``{...}``
    are placeholders the harness fills in)::

        schema = 1
        name = "my bench"
        [generator]
        reset = ["*RST", "*CLS"]        identify = "*IDN?"   opc = "*OPC?"   error = "SYST:ERR?"
        output_off = "OUTP OFF"         output_on = "OUTP ON"
        amplitude = "VOLT {amplitude_vpp}"          # or {amplitude_vpeak}
        offset = "VOLT:OFFS {offset_v}"
        arb_setup = ["FUNC ARB", "FUNC:ARB:SRAT {sample_rate_hz}"]   # {points} {name}
        arb_upload = "DATA:ARB {name},{block}"      # {block} last: #<n><len><bytes>
        arb_select = "FUNC:ARB {name}"
        trigger = "*TRG"
        sine_setup = "FUNC SIN"         frequency = "FREQ {frequency_hz}"
        max_points = 1048576            waveform_name = "HARNESS"   block_format = "float32-le"
        [digitizer]
        reset, identify, opc, error     (as above)
        configure = ["ACQ:SRAT {sample_rate_hz}", "ACQ:POIN {samples}"]  # {duration_s} {range_vpp}
        arm_triggered = ["TRIG:SOUR EXT", "INIT"]
        arm_immediate = ["TRIG:SOUR IMM", "INIT"]
        fetch = "FETC:WAV? CH{channel}"
        response_channel = 1            reference_channel = 2
        block_format = "float32-le"     # int16-le/-be, int8 need volts_per_code

    Numbers are written with 12 significant digits unless the placeholder gives a
    format (``{frequency_hz:.3f}``). Only ``amplitude`` and ``offset`` may carry level
    placeholders, so every level the generator is given is checked first.
    """
    data, raw = load_toml(path)
    return parse_command_map(data, file=str(path), sha256=sha256_hex(raw))


class _Num:
    """A number that formats with 12 significant digits by default."""

    def __init__(self, v: float):
        self.v = v

    def __format__(self, spec: str) -> str:
        if isinstance(self.v, (int, np.integer)) and not spec:
            return str(int(self.v))
        return format(float(self.v), spec or ".12g")


def fill(template: str, **values) -> str:
    """Fill a command template's placeholders (numbers with 12 significant digits)."""
    wrapped = {k: (_Num(v) if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)
                   else v) for k, v in values.items()}
    return template.format(**wrapped)


# ======================================================================================
# station section
# ======================================================================================
@dataclass(frozen=True)
class VisaConfig:
    """The parsed ``[station.visa]`` table (see the module docstring)."""

    generator: str
    digitizer: str
    commands: CommandMap
    visa_library: str = "@py"
    timeout_s: float = 2.0
    acquisition_timeout_s: float = 5.0
    transfer_bytes_per_s: float = 1e6
    stepped_sine: str = "native"
    read_termination: str = "\n"
    write_termination: str = "\n"
    station_id: str = ""


def parse_config(table: Table, *, base_dir: Path, station_id: str, backend: str) -> VisaConfig:
    """Validate ``[station.visa]``; errors name the station file and key path."""
    table.check_known(_VISA_KEYS)
    gen = table.str("generator")
    dig = table.str("digitizer")
    for key, res in (("generator", gen), ("digitizer", dig)):
        if not res.strip() or any(c.isspace() for c in res.strip()):
            raise table.error(key, f"must be a VISA resource string such as 'TCPIP::192.168.1.20::5025::SOCKET' "
                                   f"or 'USB0::0x1234::0x5678::SN::INSTR', got {res!r}")
    if gen.strip().upper() == dig.strip().upper():
        raise table.error("digitizer", "must be a different resource from the generator")
    if not table.has("commands"):
        raise table.error("commands", "missing key (a command-map file, or an inline table)")
    def parse_inline(raw, key):
        import hashlib
        import json

        digest = hashlib.sha256(json.dumps(raw, sort_keys=True).encode()).hexdigest()
        return parse_command_map(raw, file=table.file, sha256=digest, path=key)

    cmap = table.file_or_table("commands", base_dir, load=load_command_map, parse=parse_inline, what="command-map")
    mode = table.str("stepped_sine", "native", choices=STEPPED_MODES)
    if mode == "native" and not cmap.has_native_sine():
        if table.has("stepped_sine"):
            raise table.error("stepped_sine", "'native' needs generator.sine_setup, generator.frequency and "
                                              "digitizer.arm_immediate in the command map")
        mode = "arbitrary"
    term_r = table.str("read_termination", "\n")
    term_w = table.str("write_termination", "\n")
    for key, v in (("read_termination", term_r), ("write_termination", term_w)):
        if v not in ("\n", "\r\n", "\r"):
            raise table.error(key, "must be \"\\n\", \"\\r\\n\" or \"\\r\"")
    return VisaConfig(generator=gen.strip(), digitizer=dig.strip(), commands=cmap,
                      visa_library=table.str("visa_library", "@py"),
                      timeout_s=table.float("timeout_s", 2.0, min=0.05, max=600.0),
                      acquisition_timeout_s=table.float("acquisition_timeout_s", 5.0, min=0.0, max=3600.0),
                      transfer_bytes_per_s=table.float("transfer_bytes_per_s", 1e6, min=1e3),
                      stepped_sine=mode, read_termination=term_r, write_termination=term_w,
                      station_id=station_id)


# ======================================================================================
# one instrument
# ======================================================================================
class InstrumentError(InvalidMeasurement):
    """An instrument failed: the reason names the instrument and the command.

    Attributes
    ----------
    instrument : str
        ``generator`` or ``digitizer``.
    resource : str
    command : str or None
    """

    def __init__(self, instrument: str, resource: str, command: str | None, reason: str):
        self.instrument, self.resource, self.command = instrument, resource, command
        super().__init__(reason)


def _show(data: bytes, n: int = 40) -> str:
    text = repr(bytes(data[:n]))
    return text + ("..." if len(data) > n else "")


_ERR_RE = re.compile(r'^\s*([+-]?\d+)\s*,\s*"?(.*?)"?\s*$')


class Instrument:
    """One message-based VISA instrument with checked replies and timeouts.

    Parameters
    ----------
    role : str
        ``generator`` or ``digitizer`` (used in every message).
    resource : str
        VISA resource string.
    commands : dict
        This instrument's part of the command map.
    config : VisaConfig
    resource_manager : pyvisa.ResourceManager
    """

    def __init__(self, role: str, resource: str, commands: dict, config: VisaConfig, resource_manager):
        self.role, self.resource, self.commands = role, resource, commands
        self.config = config
        self.rm = resource_manager
        self.inst = None
        self.idn: str | None = None

    # -- naming ------------------------------------------------------------------------
    @property
    def who(self) -> str:
        model = ""
        if self.idn:
            parts = [p.strip() for p in self.idn.split(",")]
            model = " ".join(parts[:2]) if len(parts) >= 2 else self.idn
        return f"{self.role} {self.resource}" + (f" ({model})" if model else "")

    def fail(self, command: str | None, problem: str) -> InstrumentError:
        where = f" during {command!r}" if command else ""
        return InstrumentError(self.role, self.resource, command, f"{self.who}: {problem}{where}")

    def identity(self) -> dict:
        d: dict[str, Any] = {"resource": self.resource, "idn": self.idn}
        if self.idn:
            parts = [p.strip() for p in self.idn.split(",")]
            if len(parts) == 4:
                d.update(manufacturer=parts[0], model=parts[1], serial=parts[2], firmware=parts[3])
        return d

    # -- connection --------------------------------------------------------------------
    def open(self) -> None:
        import pyvisa

        cfg = self.config
        try:
            self.inst = self.rm.open_resource(self.resource, open_timeout=int(cfg.timeout_s * 1000))
            self.inst.timeout = cfg.timeout_s * 1000.0
            self.inst.read_termination = cfg.read_termination
            self.inst.write_termination = cfg.write_termination
        except pyvisa.errors.VisaIOError as exc:
            raise self.fail(None, f"cannot open the resource ({exc.description})") from None
        except Exception as exc:   # pyvisa-py raises plain exceptions for unreachable hosts
            raise self.fail(None, f"cannot open the resource ({exc})") from None
        self._no_delay()
        if self._socket() is not None:
            self._drain()                   # stale bytes from an earlier session
        else:
            try:
                self.inst.clear()           # device clear (USBTMC, GPIB, VXI-11)
            except Exception:
                pass    # not every interface supports it; the reset below still runs
        reset = self.commands.get("reset", [])
        for c in reset:
            self.write(c)
        self.opc(reset[-1] if reset else "opening the connection")
        ident = self.commands["identify"][0]
        self.idn = self.query(ident)
        self.check_errors(ident)

    def close(self) -> None:
        if self.inst is not None:
            try:
                self.inst.close()
            except Exception:
                pass
            self.inst = None

    def _socket(self) -> socket.socket | None:
        """The TCP socket under a pyvisa-py raw-socket session, else None."""
        try:
            sock = getattr(self.inst.visalib.sessions[self.inst.session], "interface", None)
        except Exception:
            return None
        return sock if isinstance(sock, socket.socket) else None

    def _no_delay(self) -> None:
        """Send small commands at once (TCP_NODELAY) on a raw-socket resource. Without
        it, a command followed by a query waits for the instrument's delayed ACK (about
        40 ms on Linux) on every exchange. pyvisa-py 0.8 cannot set VI_ATTR_TCPIP_NODELAY
        through its attribute table, so the socket option is set directly."""
        sock = self._socket()
        if sock is not None:
            try:
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            except OSError:
                pass

    def _peer_closed(self) -> bool:
        """Best effort: has the other end closed a raw-socket connection? (pyvisa-py
        reports a closed socket as a timeout.)"""
        try:
            sock = self._socket()
            if sock is None:
                return False
            return sock.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT) == b""
        except (BlockingIOError, InterruptedError):
            return False
        except OSError:
            return True
        except Exception:
            return False

    def _io_error(self, command: str, exc: Exception, timeout_s: float) -> InstrumentError:
        import pyvisa

        if isinstance(exc, pyvisa.errors.VisaIOError):
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                if self._peer_closed():
                    return self.fail(command, "the connection was closed by the instrument (dropped)")
                return self.fail(command, f"no complete reply within {timeout_s:.3g} s (timeout)")
            if exc.error_code in (pyvisa.constants.StatusCode.error_connection_lost,
                                  pyvisa.constants.StatusCode.error_io):
                return self.fail(command, f"connection lost ({exc.description})")
            return self.fail(command, f"VISA error {exc.abbreviation}: {exc.description}")
        if isinstance(exc, (BrokenPipeError, ConnectionError)):
            return self.fail(command, f"the connection was closed or refused ({exc.strerror or exc})")
        if isinstance(exc, OSError):
            return self.fail(command, f"I/O error ({exc.strerror or exc})")
        return self.fail(command, f"{type(exc).__name__}: {exc}")

    def _need_open(self, command: str) -> None:
        if self.inst is None:
            raise self.fail(command, "not connected")

    # -- primitives --------------------------------------------------------------------
    def _deadline(self, seconds: float):
        """A watchdog for writes on a raw socket: pyvisa-py waits for the socket to accept
        data without any timeout, so an instrument that stops reading would block a write
        for ever. After `seconds` the socket is shut down, which ends the wait with an
        error. Returns the timer (cancel it) or None (other sessions time out in VISA)."""
        sock = self._socket()
        if sock is None:
            return None

        def fire():
            self._write_expired = True
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass

        self._write_expired = False
        timer = threading.Timer(seconds, fire)
        timer.daemon = True
        timer.start()
        return timer

    def _write(self, fn, data, command: str) -> None:
        self._need_open(command)
        limit = self.config.timeout_s + len(data) / self.config.transfer_bytes_per_s
        timer = self._deadline(limit)
        try:
            self.inst.timeout = self.config.timeout_s * 1000.0
            fn(data)
        except Exception as exc:
            if getattr(self, "_write_expired", False):
                raise self.fail(command, f"the instrument did not accept the command within {limit:.3g} s "
                                         "(write timeout; connection closed)") from None
            raise self._io_error(command, exc, self.config.timeout_s) from None
        finally:
            if timer is not None:
                timer.cancel()

    def write(self, command: str) -> None:
        """Send one command (the write termination is added)."""
        self._write(lambda d: self.inst.write(d), command, command)

    def write_raw(self, data: bytes, command: str) -> None:
        """Send bytes as they are (a command with a binary block and its terminator)."""
        self._write(lambda d: self.inst.write_raw(d), data, command)

    def _drain(self, seconds: float = 0.2) -> bytes:
        """Drop what a raw socket holds right now (a stale reply), for at most
        `seconds`, without waiting for more. pyvisa-py's device clear drains until the
        line has been quiet for 0.1 s, which never ends with an instrument that keeps
        talking."""
        sock = self._socket()
        got = bytearray()
        if sock is None:
            return bytes(got)
        t_end = time.monotonic() + seconds
        while time.monotonic() < t_end and len(got) < 1 << 20:
            try:
                chunk = sock.recv(65536, socket.MSG_DONTWAIT)
            except (BlockingIOError, InterruptedError):
                break                           # nothing more waiting
            except OSError:
                break
            if not chunk:
                break
            got.extend(chunk)
        try:
            self.inst.visalib.sessions[self.inst.session]._pending_buffer.clear()
        except Exception:
            pass
        return bytes(got)

    def query(self, command: str, timeout_s: float | None = None) -> str:
        """Send a query and return its text reply, checked: it must arrive within the
        timeout, end with the read termination and be printable ASCII."""
        timeout_s = self.config.timeout_s if timeout_s is None else timeout_s
        self.write(command)
        try:
            self.inst.timeout = timeout_s * 1000.0
            raw = self.inst.read_raw()
        except Exception as exc:
            raise self._io_error(command, exc, timeout_s) from None
        finally:
            self.inst.timeout = self.config.timeout_s * 1000.0
        term = self.config.read_termination.encode()
        if not raw.endswith(term[-1:]):
            raise self.fail(command, f"reply without its terminator: {_show(raw)}")
        body = raw[:-len(term)] if raw.endswith(term) else raw[:-1]
        try:
            text = body.decode("ascii")
        except UnicodeDecodeError:
            raise self.fail(command, f"garbled reply (not ASCII text): {_show(raw)}") from None
        if any(not (32 <= ord(c) < 127 or c == "\t") for c in text):
            raise self.fail(command, f"garbled reply (control characters): {_show(raw)}")
        if text.lstrip().startswith("#") and len(text) > 1 and text.lstrip()[1:2].isdigit():
            raise self.fail(command, f"garbled reply (a binary block where text was expected): {_show(raw)}")
        return text.strip()

    def opc(self, after: str, timeout_s: float | None = None) -> None:
        """``*OPC?``: wait until the instrument has finished `after`; the reply must be 1."""
        cmd = self.commands["opc"][0]
        reply = self.query(cmd, timeout_s)
        if reply.lstrip("+") != "1":
            raise self.fail(cmd, f"garbled reply {reply[:40]!r} (expected 1) after {after!r}")

    def check_errors(self, after: str) -> None:
        """Read the error queue until it reports 0; any entry fails naming `after`."""
        cmd = self.commands["error"][0]
        entries = []
        for _ in range(MAX_ERROR_ENTRIES):
            try:
                reply = self.query(cmd)
            except InstrumentError as exc:       # name the command the check was for
                raise InstrumentError(self.role, self.resource, after,
                                      f"{exc.reason} (checking the error queue after {after!r})") from None
            m = _ERR_RE.match(reply)
            if not m:
                raise self.fail(cmd, f"garbled error-queue reply {reply[:60]!r} (expected <code>,\"<text>\") "
                                     f"after {after!r}")
            if int(m.group(1)) == 0:
                break
            entries.append(f"{int(m.group(1))},\"{m.group(2)}\"")
        else:
            entries.append(f"(more than {MAX_ERROR_ENTRIES} entries)")
        if entries:
            raise InstrumentError(self.role, self.resource, after,
                                  f"{self.who}: error queue after {after!r}: {'; '.join(entries)}")

    def send(self, key: str, **values) -> None:
        """Every command of command-map `key`, each followed by an error-queue check."""
        for t in self.commands.get(key, []):
            c = fill(t, **values)
            self.write(c)
            self.check_errors(c)

    def send_block(self, key: str, payload: bytes, **values) -> None:
        """The one command of `key` whose last placeholder ``{block}`` becomes an IEEE
        488.2 definite-length block of `payload` (exact byte count)."""
        t = self.commands[key][0]
        prefix = fill(t[:t.rindex("{block}")], **values)
        length = str(len(payload)).encode()
        if len(length) > 9:
            raise self.fail(prefix, f"a block of {len(payload)} bytes does not fit a definite-length header")
        block = b"#" + str(len(length)).encode() + length + payload
        shown = f"{prefix}#{len(length)}{len(payload)}<{len(payload)} bytes>"
        self.write_raw(prefix.encode("ascii") + block + self.config.write_termination.encode(), shown)
        self.check_errors(shown)

    def query_block(self, command: str, n_bytes: int, timeout_s: float) -> bytes:
        """Send `command` and read one definite-length block of exactly `n_bytes`."""
        self.write(command)
        inst = self.inst
        term = self.config.read_termination
        try:
            inst.read_termination = None             # a LF inside the data must not end a read
            inst.timeout = timeout_s * 1000.0
            head = inst.read_bytes(2)
            if head[:1] != b"#" or not head[1:2].isdigit() or head[1:2] == b"0":
                raise self.fail(command, f"garbled reply: expected a definite-length block '#<n><length>', got "
                                         f"{_show(head + self._peek_rest())}")
            nd = int(head[1:2])
            digits = inst.read_bytes(nd)
            if not digits.isdigit():
                raise self.fail(command, f"garbled block header {_show(head + digits)}")
            length = int(digits)
            if length != n_bytes:
                raise self.fail(command, f"block of {length} bytes, expected {n_bytes} (wrong sample count or format)")
            inst.timeout = (timeout_s + n_bytes / self.config.transfer_bytes_per_s) * 1000.0
            data = inst.read_bytes(n_bytes) if n_bytes else b""
            inst.timeout = self.config.timeout_s * 1000.0
            end = inst.read_bytes(len(term))
            if end != term.encode():
                raise self.fail(command, f"block not followed by its terminator (got {_show(end)})")
        except InstrumentError:
            raise
        except Exception as exc:
            raise self._io_error(command, exc, timeout_s) from None
        finally:
            try:
                inst.read_termination = term
                inst.timeout = self.config.timeout_s * 1000.0
            except Exception:
                pass
        if len(data) != n_bytes:
            raise self.fail(command, f"{len(data)} bytes received, the block header said {n_bytes}")
        return data

    def _peek_rest(self) -> bytes:
        """Up to 64 more bytes of a garbled reply, for the message (0.1 s at most)."""
        try:
            self.inst.timeout = 100.0
            return bytes(self.inst.read_bytes(64, break_on_termchar=True))
        except Exception:
            return b""


# ======================================================================================
# the backend
# ======================================================================================
def _encode(samples: np.ndarray, fmt: str) -> bytes:
    dt = BLOCK_FORMATS[fmt]
    if fmt.startswith("float"):
        return np.asarray(samples, dtype=dt).tobytes()
    return np.asarray(np.round(samples * 32767.0), dtype=dt).tobytes()


class VisaBackend:
    """Generator + digitizer through VISA (see the module docstring).

    Parameters
    ----------
    config : VisaConfig
    sample_rate_hz : float
        Station rate: the generator's arbitrary sample rate and the digitizer's rate.
    full_scale_volts : float
        Generator volts (peak) that correspond to 0 dBFS; the digitizer's volts are
        divided by it too.
    max_output_dbfs : float
        The station's limit; every amplitude the generator is given is checked against
        it before the command is sent.
    resource_manager : pyvisa.ResourceManager, optional
        Default ``pyvisa.ResourceManager(config.visa_library)``.

    Connections open on first use (`identity`, `play_and_capture`, `measure_steps`).
    """

    has_reference = True

    def __init__(self, config: VisaConfig, *, sample_rate_hz: float, full_scale_volts: float,
                 max_output_dbfs: float, resource_manager=None):
        self.config = config
        self.sample_rate_hz = float(sample_rate_hz)
        self.full_scale_volts = float(full_scale_volts)
        self.max_output_dbfs = float(max_output_dbfs)
        self._rm = resource_manager
        self._own_rm = resource_manager is None
        self.generator: Instrument | None = None
        self.digitizer: Instrument | None = None
        self._open_error: str | None = None
        self._calls = 0

    # -- connection --------------------------------------------------------------------
    def _resource_manager(self):
        if self._rm is None:
            import pyvisa

            try:
                self._rm = pyvisa.ResourceManager(self.config.visa_library)
            except Exception as exc:
                raise InvalidMeasurement(f"VISA library {self.config.visa_library!r} cannot be loaded: {exc}") from None
        return self._rm

    def open(self) -> None:
        """Connect both instruments (reset, identify, empty error queues)."""
        if self.generator is not None and self.digitizer is not None:
            return
        rm = self._resource_manager()
        cm = self.config.commands
        gen = Instrument("generator", self.config.generator, cm.generator, self.config, rm)
        dig = Instrument("digitizer", self.config.digitizer, cm.digitizer, self.config, rm)
        try:
            gen.open()
            gen.send("output_off")
            dig.open()
        except InvalidMeasurement as exc:
            gen.close()
            dig.close()
            self._open_error = exc.reason
            raise
        self.generator, self.digitizer = gen, dig
        self._open_error = None

    def close(self) -> None:
        """Output off (best effort) and release both resources."""
        if self.generator is not None:
            # output off, best effort and without waiting for replies: a generator that
            # has just failed must not cost another timeout here
            for t in self.generator.commands.get("output_off", []):
                try:
                    self.generator.write(t)
                except Exception:
                    break
        for inst in (self.generator, self.digitizer):
            if inst is not None:
                inst.close()
        self.generator = self.digitizer = None
        if self._own_rm and self._rm is not None:
            try:
                self._rm.close()
            except Exception:
                pass
            self._rm = None

    def __enter__(self) -> "VisaBackend":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def identity(self) -> dict:
        """Both instruments' ``*IDN?`` (split into manufacturer, model, serial, firmware
        when it has the four IEEE 488.2 fields), the command map and the settings. Never
        raises: a connection problem is reported under ``error``."""
        d: dict[str, Any] = {"backend": "visa", "visa_library": self.config.visa_library,
                             "command_map": self.config.commands.describe(),
                             "full_scale_volts": self.full_scale_volts, "stepped_sine": self.config.stepped_sine}
        if self._open_error is not None:
            d["error"] = self._open_error            # not retried here (each try may cost a timeout)
        else:
            try:
                self.open()
            except InvalidMeasurement as exc:
                d["error"] = exc.reason
        d["generator"] = self.generator.identity() if self.generator else {"resource": self.config.generator}
        d["digitizer"] = self.digitizer.identity() if self.digitizer else {"resource": self.config.digitizer}
        return d

    # -- levels ------------------------------------------------------------------------
    @property
    def max_peak_volts(self) -> float:
        return self.full_scale_volts * 10.0 ** (self.max_output_dbfs / 20.0)

    def _check_amplitude(self, vpp: float, offset_v: float = 0.0) -> None:
        peak = vpp / 2.0 + abs(offset_v)
        if not math.isfinite(peak) or peak > self.max_peak_volts * (1.0 + 1e-9):
            dbfs = 20.0 * math.log10(peak / self.full_scale_volts) if peak > 0 else -math.inf
            raise LevelLimitError(
                f"refused: generator amplitude {vpp:.6g} Vpp (peak {peak:.6g} V = {dbfs:.2f} dBFS at "
                f"{self.full_scale_volts:g} V full scale) exceeds the station's maximum output level "
                f"{self.max_output_dbfs:.2f} dBFS ({self.max_peak_volts:.6g} V peak); no level command was sent")

    def _set_level(self, vpp: float) -> None:
        self._check_amplitude(vpp, 0.0)
        gen = self.generator
        gen.send("offset", offset_v=0.0)
        gen.send("amplitude", amplitude_vpp=vpp, amplitude_vpeak=vpp / 2.0)

    # -- captures ----------------------------------------------------------------------
    def _fetch(self, n: int, timeout_s: float) -> tuple[np.ndarray, np.ndarray]:
        dig = self.digitizer
        opts = self.config.commands.digitizer_options
        fmt = opts["block_format"]
        dt = np.dtype(BLOCK_FORMATS[fmt])
        out = []
        for ch in (opts["response_channel"], opts["reference_channel"]):
            cmd = fill(dig.commands["fetch"][0], channel=ch)
            data = dig.query_block(cmd, n * dt.itemsize, timeout_s)
            x = np.frombuffer(data, dtype=dt).astype(np.float64)
            if not fmt.startswith("float"):
                x = x * float(opts["volts_per_code"])
            if not np.all(np.isfinite(x)):
                raise dig.fail(cmd, "the block holds non-finite samples (NaN or inf): garbled data")
            out.append(x / self.full_scale_volts)
            dig.check_errors(cmd)
        return out[0], out[1]

    def _acquire_timeout(self, n: int) -> float:
        return self.config.timeout_s + n / self.sample_rate_hz + self.config.acquisition_timeout_s

    def _check_points(self, n: int, who: str) -> None:
        opts = self.config.commands.generator_options if who == "generator" else \
            self.config.commands.digitizer_options
        mx = int(opts.get("max_points") or 1 << 60)
        if n > mx:
            raise ConfigError(self.config.commands.file, f"{who}.max_points",
                              f"the measurement needs {n} points, the command map allows {mx} "
                              f"(shorter stimulus, or raise max_points if the instrument holds more)")

    def play_and_capture(self, stimulus: np.ndarray, *, extra_samples: int = 0) -> Capture:
        """Play `stimulus` once as an arbitrary waveform and capture ``len(stimulus) +
        extra_samples`` samples of both channels (module docstring).

        Raises
        ------
        LevelLimitError
            Stimulus or amplitude above the station's limit (nothing was sent).
        InstrumentError
            Any instrument failure (names instrument and command).
        """
        x = np.asarray(stimulus, dtype=np.float64)
        if x.ndim != 1 or x.size < 2 or not np.all(np.isfinite(x)):
            raise ValueError("stimulus must be a finite one-dimensional array of at least 2 samples")
        if isinstance(extra_samples, bool) or int(extra_samples) < 0:
            raise ValueError(f"extra_samples must be a whole number >= 0, got {extra_samples!r}")
        assert_level(x, self.max_output_dbfs)                       # before anything is sent
        peak = float(np.max(np.abs(x)))
        if peak == 0.0:
            raise InvalidMeasurement("the stimulus is silent (all samples zero): nothing to play")
        vpp = 2.0 * peak * self.full_scale_volts
        self._check_amplitude(vpp)
        n = x.size + int(extra_samples)
        self._check_points(x.size, "generator")
        self._check_points(n, "digitizer")
        self.open()
        gen, dig = self.generator, self.digitizer
        fs = self.sample_rate_hz
        gopts = self.config.commands.generator_options
        name = gopts["waveform_name"]
        t0 = time.monotonic()
        gen.send("output_off")
        gen.send("arb_setup", sample_rate_hz=fs, points=x.size, name=name)
        gen.send_block("arb_upload", _encode(x / peak, gopts["block_format"]), name=name, points=x.size)
        gen.send("arb_select", name=name, points=x.size, sample_rate_hz=fs)
        self._set_level(vpp)
        gen.opc("arbitrary waveform set-up")
        dig.send("configure", sample_rate_hz=fs, samples=n, duration_s=n / fs, range_vpp=2 * self.full_scale_volts)
        dig.send("arm_triggered", sample_rate_hz=fs, samples=n)
        gen.send("output_on")
        gen.send("trigger")
        dig.opc(dig.commands["arm_triggered"][-1], self._acquire_timeout(n))
        resp, ref = self._fetch(n, self.config.timeout_s)
        gen.send("output_off")
        self._calls += 1
        meta = {"backend": "visa", "method": "arbitrary waveform", "call_index": self._calls - 1,
                "generator_idn": gen.idn, "digitizer_idn": dig.idn, "amplitude_vpp": vpp,
                "waveform_points": int(x.size), "capture_points": int(n),
                "full_scale_volts": self.full_scale_volts, "duration_s": time.monotonic() - t0}
        return Capture(response=resp, reference=ref, sample_rate_hz=fs, metadata=meta)

    def measure_steps(self, plan, *, extra_samples: int = 0) -> Capture:
        """Measure a `harness.stimulus.SteppedSinePlan` with the generator in sine mode
        (``stepped_sine = "native"``; with "arbitrary" the plan's signal is played by
        `play_and_capture`). Returns one capture laid out as the plan's continuous
        signal would be captured (module docstring), for
        `harness.estimate.estimate_stepped_sine`.
        """
        if self.config.stepped_sine != "native":
            return self.play_and_capture(plan.signal(), extra_samples=extra_samples)
        from harness.estimate import sine_fit_3, sine_fit_4

        fs = self.sample_rate_hz
        if abs(float(plan.sample_rate_hz) - fs) > 1e-9 * fs:
            raise ValueError(f"the plan is for {plan.sample_rate_hz:g} Hz, the station runs at {fs:g} Hz")
        amp = float(plan.amplitude)
        assert_level(np.array([amp]), self.max_output_dbfs)           # before anything is sent
        vpp = 2.0 * amp * self.full_scale_volts
        self._check_amplitude(vpp)
        freq = np.asarray(plan.freq_hz, dtype=float)
        starts = np.asarray(plan.step_starts, dtype=np.int64)
        stops = np.array([int(b) for _, b in plan.segments], dtype=np.int64)
        n_sig = int(stops[-1])
        extra = int(extra_samples)
        margin = int(math.ceil(PLACEMENT_MAX_PPM * 1e-6 * n_sig)) + 16
        lead = [int(math.ceil(fs / f)) + 2 for f in freq]
        lengths = [int(lead[k] + (stops[k] - starts[k]) + margin + (extra if k == freq.size - 1 else 0))
                   for k in range(freq.size)]
        self._check_points(max(lengths), "digitizer")
        self.open()
        gen, dig = self.generator, self.digitizer
        t0 = time.monotonic()
        gen.send("output_off")
        gen.send("sine_setup")
        gen.send("frequency", frequency_hz=float(freq[0]))
        self._set_level(vpp)
        gen.opc("sine set-up")
        gen.send("output_on")
        resp, ref = [], []
        for k, f in enumerate(freq):
            if k:
                gen.send("frequency", frequency_hz=float(f))
                gen.opc(fill(gen.commands["frequency"][0], frequency_hz=float(f)))
            n = lengths[k]
            dig.send("configure", sample_rate_hz=fs, samples=n, duration_s=n / fs, range_vpp=2 * self.full_scale_volts)
            dig.send("arm_immediate", sample_rate_hz=fs, samples=n)
            dig.opc(dig.commands["arm_immediate"][-1], self._acquire_timeout(n))
            y, r = self._fetch(n, self.config.timeout_s)
            resp.append(y)
            ref.append(r)
        gen.send("output_off")
        self._calls += 1

        # clock ratio from four-parameter fits of the reference (weights as the estimator's)
        settle = int(plan.settle_samples)
        eps_k, w_k = [], []
        for k, f in enumerate(freq):
            seg = ref[k][lead[k] + settle: lead[k] + int(stops[k] - starts[k])]
            if seg.size < 16 or seg.size * f / fs < 2:
                continue
            a, _, _, f_fit, res = sine_fit_4(seg, f, fs)
            if a <= 0 or not math.isfinite(f_fit) or a * a * seg.size / (4 * max(res, 1e-300) ** 2) < 100.0:
                continue
            var_w = 12.0 * res ** 2 / (a * a * seg.size * (seg.size ** 2 - 1.0))
            u_rel = math.sqrt(var_w) * fs / (2 * math.pi) / f_fit
            eps_k.append(f / f_fit - 1.0)
            w_k.append(1.0 / max(u_rel, 1e-15) ** 2)
        eps = float(np.sum(np.multiply(w_k, eps_k)) / np.sum(w_k)) if eps_k else 0.0
        eps_placed = float(np.clip(eps, -PLACEMENT_MAX_PPM * 1e-6, PLACEMENT_MAX_PPM * 1e-6))
        alpha = 1.0 + eps_placed

        # assemble: step k at round(start_k * alpha), from the sample where its reference
        # tone crosses zero rising (the phase the plan gives every step's start)
        total = n_sig + extra
        pos = [int(round(s * alpha)) for s in starts] + [total]
        y_out = np.empty(total)
        r_out = np.empty(total)
        offsets = []
        for k, f in enumerate(freq):
            w = 2.0 * math.pi * f / (fs * alpha)
            span = lead[k] + int(stops[k] - starts[k])
            _, theta, _, _ = sine_fit_3(ref[k][:span], f / alpha, fs)
            o = int(round(((-math.pi / 2 - theta) % (2 * math.pi)) / w))      # < one period < lead[k]
            need = pos[k + 1] - pos[k]
            if o + need > ref[k].size:
                raise InvalidMeasurement(f"native stepped sine: step {k} at {f:.6g} Hz captured {ref[k].size} samples, "
                                         f"{o + need} needed (clock offset beyond {PLACEMENT_MAX_PPM:g} ppm?)")
            y_out[pos[k]:pos[k + 1]] = resp[k][o:o + need]
            r_out[pos[k]:pos[k + 1]] = ref[k][o:o + need]
            offsets.append(o)
        meta = {"backend": "visa", "method": "instrument-native stepped sine (one capture per step, assembled)",
                "call_index": self._calls - 1, "generator_idn": gen.idn, "digitizer_idn": dig.idn,
                "amplitude_vpp": vpp, "steps": int(freq.size), "step_capture_points": lengths,
                "step_offsets_samples": offsets, "step_positions_samples": pos[:-1],
                "placement_clock_offset_ppm": eps_placed * 1e6, "full_scale_volts": self.full_scale_volts,
                "duration_s": time.monotonic() - t0}
        if eps != eps_placed:
            meta["note"] = f"clock offset {eps * 1e6:.1f} ppm beyond the {PLACEMENT_MAX_PPM:g} ppm placement limit"
        return Capture(response=y_out, reference=r_out, sample_rate_hz=fs, metadata=meta)


def open_backend(station) -> VisaBackend:
    """The VISA backend of a station whose ``[station.visa]`` was parsed by
    `parse_config`. Connections open on first use."""
    cfg = station.section("visa")
    if cfg is None:
        raise ConfigError(station.path, "station.visa", "missing table [station.visa] (a visa station needs it)")
    if station.full_scale_volts is None:
        raise ConfigError(station.path, "station.full_scale_volts",
                          "missing key (the VISA backend needs the generator volts, peak, that correspond to 0 dBFS)")
    if not station.reference_channel:
        raise ConfigError(station.path, "station.reference_channel",
                          "must be true for the VISA backend (the digitizer's reference channel takes the generator "
                          "output back)")
    return VisaBackend(cfg, sample_rate_hz=station.sample_rate_hz, full_scale_volts=station.full_scale_volts,
                       max_output_dbfs=station.max_output_dbfs)
