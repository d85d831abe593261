"""Simulated lab instruments over TCP: a function / arbitrary-waveform generator and a
two-channel digitizer, with a simulated board between them.

Run it as a separate process::

    python -m harness.instrument_server --device fixtures/dut-dsp8k-sos.toml --port 0
    harness instrument-server --device fixtures/dut-dsp8k-sos.toml --port 5025

When it is ready it prints ONE line on stdout (and flushes it)::

    READY generator=TCPIP::127.0.0.1::41234::SOCKET digitizer=TCPIP::127.0.0.1::41235::SOCKET

Each instrument listens on its own TCP port (``--port`` for the generator, the
digitizer on ``--digitizer-port``, default the next port, or an ephemeral one when
``--port 0``), so a VISA client opens them as two raw-socket resources
``TCPIP::127.0.0.1::<port>::SOCKET`` just as it would two instruments on a bench network.

The bench it simulates
----------------------
::

    generator output --+--> board input   (device model, `SimulatedBoard`) --> digitizer CH1
                       +------------------------------------------------------> digitizer CH2

Volts: the simulated board works in full-scale units (1.0 = 0 dBFS of the simulation);
``--full-scale-volts`` (default 1.0 V) is what 1.0 means at the generator output and
the digitizer inputs. The digitizer clips at +-full scale (like the ADC of
`SimulatedBoard`); the generator refuses amplitudes above ``--max-vpp`` (error -222).

Clock, latency, noise: the digitizer's sample clock runs ``--clock-ppm`` fast relative
to the generator's (positive = more digitizer samples per second; default the device
model's ``clock_offset_ppm``); the trigger path delays both channels by
``--latency-samples``; ``--noise-dbfs`` adds white noise (rms, dBFS of the simulation)
to both digitizer inputs. `harness.backends.simulated.SimulatedBoard` does the signal
work (board filter, imperfections, resampling onto the digitizer clock, latency), so a
board measured through these instruments and through the simulated backend agree.

Command language (SCPI-style, ASCII, each message ended by LF; CR LF accepted; several
commands in one message separated by ``;``; long or short mnemonic forms, any case)
-------------------------------------------------------------------------------------
Both instruments: ``*IDN?``, ``*RST``, ``*CLS``, ``*OPC?``, ``*OPC``, ``*WAI``,
``*ESR?``, ``SYSTem:ERRor[:NEXT]?`` (``<code>,"<text>"``, ``0,"No error"`` when empty).

Generator: ``[SOURce:]FUNCtion[:SHAPe] SINusoid|ARBitrary`` (and ``?``),
``[SOURce:]FREQuency[:CW] <Hz>``, ``[SOURce:]VOLTage[:AMPLitude] <Vpp>``,
``[SOURce:]VOLTage:OFFSet <V>``, ``OUTPut[:STATe] ON|OFF``,
``[SOURce:]DATA:ARBitrary <name>,<block>`` (upload), ``[SOURce:]FUNCtion:ARBitrary <name>``
(select), ``[SOURce:]FUNCtion:ARBitrary:SRATe <Sa/s>``, ``[SOURce:]BURSt:MODE TRIGgered``,
``[SOURce:]BURSt:NCYCles 1``, ``[SOURce:]BURSt:STATe ON|OFF``, ``TRIGger:SOURce BUS``,
``*TRG`` / ``TRIGger[:IMMediate]`` (play the selected waveform once and pulse the trigger
output, which is wired to the digitizer's external trigger input).

Digitizer: ``ACQuire:SRATe <Sa/s>``, ``ACQuire:POINts <n>``,
``TRIGger:SOURce EXTernal|IMMediate``, ``INITiate[:IMMediate]`` (arm; with IMMediate the
capture starts at once, with the generator in sine mode the board has then been driven
for ``--command-gap-s`` since the last frequency change), ``ABORt``,
``FETCh:WAVeform? CH1|CH2`` (block). An acquisition runs in the background (the
instruments keep answering); ``*OPC?`` on the digitizer answers when it has completed (not
while armed and waiting for a trigger, nor while acquiring).

Binary blocks (IEEE 488.2 definite length): ``#<n><length><bytes>``, ``n`` one digit
1..9 giving how many digits ``length`` has, ``length`` the exact byte count. Samples are
float32 little-endian (4 bytes each): waveform uploads are normalised samples in -1..+1
(the amplitude command scales them to volts: ``v = sample * Vpp / 2 + offset``);
captures are volts. A reply block is followed by LF. An indefinite block (``#0``), a
length that is not a multiple of 4 or samples outside -1..+1 give an error-queue entry.

Errors follow the SCPI numbering (IEEE 488.2 / SCPI-99 error codes, from memory): -102
syntax error, -108 parameter not allowed, -109 missing parameter, -113 undefined header,
-160 block data error, -200 execution error, -213 init ignored, -221 settings conflict,
-222 data out of range, -224 illegal parameter value, -230 data corrupt or stale, -350 queue overflow.
A query that fails puts an entry in the queue and sends no reply, as instruments do.

Misbehaviour (to test a client's handling): ``--misbehave slow|garbage|error|drop``
applies to every command whose header starts with ``--on`` (default ``FETC``,
case-insensitive, short or long form as sent) on ``--instrument generator|digitizer|any``:
``slow`` answers ``--slow-s`` later (default 30 s), ``garbage`` replaces the reply by
bytes that are neither text nor a valid block, ``error`` puts ``-200,"Execution error;
simulated fault"`` in the error queue (and then executes the command), ``drop`` closes the
connection. ``--reply-delay-s`` delays every reply (a slow instrument that still answers).
``--max-lifetime-s`` stops the server after that long (a safety net for test runs).
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import re
import socket
import socketserver
import sys
import threading
import time
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from harness.backends.simulated import SimulatedBoard
from harness.device import DeviceModel, load_device_model
from harness.errors import HarnessError

MAX_MESSAGE_BYTES = 256 * 1024 * 1024     # a message longer than this is refused (-223)
ERROR_QUEUE_LENGTH = 16
MISBEHAVIOURS = ("slow", "garbage", "error", "drop")
INSTRUMENTS = ("generator", "digitizer", "any")
DEFAULT_MAX_POINTS = 16 * 1024 * 1024
SIM_MANUFACTURER = "harness-sim"


def _version() -> str:
    try:
        from harness import __version__
        return str(__version__)
    except Exception:  # pragma: no cover
        return "0"


# ======================================================================================
# SCPI headers
# ======================================================================================
def compile_header(spec: str) -> re.Pattern:
    """Regular expression for a SCPI header written in the usual notation.

    Upper-case letters are the short form, the whole word the long form (either is
    accepted, nothing in between), ``[...]`` is optional, a leading ``:`` is allowed.
    ``compile_header("[SOURce:]FREQuency[:CW]")`` matches ``FREQ``, ``SOUR:FREQ:CW``,
    ``:source:frequency``...
    """
    out = [":?"]
    i = 0
    while i < len(spec):
        c = spec[i]
        if c == "[":
            out.append("(?:")
            i += 1
        elif c == "]":
            out.append(")?")
            i += 1
        elif c in ":?*":
            out.append(re.escape(c))
            i += 1
        else:
            j = i
            while j < len(spec) and (spec[j].isalnum()):
                j += 1
            word = spec[i:j]
            if not word:
                raise ValueError(f"bad header spec {spec!r}")
            k = 0
            while k < len(word) and not word[k].islower():
                k += 1
            short, long_ = word[:k], word.upper()
            out.append(f"(?:{long_}|{short})" if short != long_ else long_)
            i = j
    return re.compile("".join(out), re.IGNORECASE)


class ScpiError(Exception):
    """An error-queue entry: SCPI code and text."""

    def __init__(self, code: int, text: str):
        self.code, self.text = int(code), str(text)
        super().__init__(f'{code},"{text}"')


@dataclass
class Block:
    """A definite-length block argument."""

    data: bytes


def split_message(msg: bytes) -> list[bytes]:
    """Split one message (without its LF) into program units at ``;`` outside quotes
    and blocks."""
    units, start, i, quote = [], 0, 0, False
    n = len(msg)
    while i < n:
        c = msg[i:i + 1]
        if quote:
            if c == b'"':
                quote = False
            i += 1
        elif c == b'"':
            quote = True
            i += 1
        elif c == b"#" and i + 1 < n and msg[i + 1:i + 2].isdigit() and msg[i + 1:i + 2] != b"0":
            nd = int(msg[i + 1:i + 2])
            digits = msg[i + 2:i + 2 + nd]
            if len(digits) == nd and digits.isdigit():
                i += 2 + nd + int(digits)
            else:
                i += 1
        elif c == b";":
            units.append(msg[start:i])
            start = i + 1
            i += 1
        else:
            i += 1
    units.append(msg[start:])
    # leading blanks only: a block's last bytes may be whitespace values
    return [u.lstrip() for u in units if u.strip()]


def next_message(buf: bytearray) -> tuple[bytes | None, int]:
    """Find one complete message in `buf`: ``(message without its terminator,
    bytes consumed)`` or ``(None, 0)`` when more bytes are needed. A block's bytes are
    skipped by their count (they may contain LF)."""
    i, quote, n = 0, False, len(buf)
    while i < n:
        c = buf[i]
        if quote:
            if c == 0x22:
                quote = False
            i += 1
            continue
        if c == 0x22:
            quote = True
            i += 1
        elif c == 0x23 and i + 1 < n and 0x31 <= buf[i + 1] <= 0x39:     # '#1'..'#9'
            nd = buf[i + 1] - 0x30
            if i + 2 + nd > n:
                return None, 0
            digits = bytes(buf[i + 2:i + 2 + nd])
            if not digits.isdigit():
                i += 1
                continue
            end = i + 2 + nd + int(digits)
            if end > n:
                return None, 0
            i = end
        elif c == 0x0A:
            msg = bytes(buf[:i])
            if msg.endswith(b"\r"):
                msg = msg[:-1]
            return msg, i + 1
        else:
            i += 1
    return None, 0


def parse_args(raw: bytes) -> list:
    """Arguments of one program unit: strings (quotes removed) and `Block` objects."""
    args: list = []
    i, n = 0, len(raw)
    while i < n:
        while i < n and raw[i:i + 1] in (b" ", b"\t"):
            i += 1
        if i >= n:
            break
        if raw[i:i + 1] == b"#":
            if i + 1 >= n or not raw[i + 1:i + 2].isdigit():
                raise ScpiError(-160, "Block data error; bad block header")
            nd = int(raw[i + 1:i + 2])
            if nd == 0:
                raise ScpiError(-160, "Block data error; indefinite-length blocks are not accepted")
            digits = raw[i + 2:i + 2 + nd]
            if len(digits) != nd or not digits.isdigit():
                raise ScpiError(-160, "Block data error; bad length digits")
            length = int(digits)
            data = raw[i + 2 + nd:i + 2 + nd + length]
            if len(data) != length:
                raise ScpiError(-160, f"Block data error; {len(data)} bytes received, header says {length}")
            args.append(Block(bytes(data)))
            i = i + 2 + nd + length
        elif raw[i:i + 1] == b'"':
            j = raw.find(b'"', i + 1)
            if j < 0:
                raise ScpiError(-102, "Syntax error; unterminated string")
            args.append(raw[i + 1:j].decode("ascii", "replace"))
            i = j + 1
        else:
            j = raw.find(b",", i)
            j = n if j < 0 else j
            try:
                args.append(raw[i:j].decode("ascii").strip())
            except UnicodeDecodeError:
                raise ScpiError(-102, "Syntax error; non-ASCII parameter") from None
            i = j
        while i < n and raw[i:i + 1] in (b" ", b"\t"):
            i += 1
        if i < n:
            if raw[i:i + 1] != b",":
                raise ScpiError(-102, "Syntax error; expected ','")
            i += 1
    return args


def ieee_block(data: bytes) -> bytes:
    """``#<n><length><data>`` (IEEE 488.2 definite-length arbitrary block)."""
    length = str(len(data)).encode()
    return b"#" + str(len(length)).encode() + length + data


def _number(args: list, i: int = 0, *, integer: bool = False) -> float:
    if len(args) <= i:
        raise ScpiError(-109, "Missing parameter")
    a = args[i]
    if isinstance(a, Block):
        raise ScpiError(-104, "Data type error; number expected")
    try:
        v = float(a)
    except ValueError:
        raise ScpiError(-104, f"Data type error; number expected, got {a[:20]!r}") from None
    if not math.isfinite(v):
        raise ScpiError(-222, "Data out of range")
    if integer:
        if v != int(v):
            raise ScpiError(-224, "Illegal parameter value; whole number expected")
        return int(v)
    return v


def _word(args: list, choices: dict, i: int = 0) -> str:
    """A character parameter: `choices` maps accepted spellings (upper case) to a value."""
    if len(args) <= i:
        raise ScpiError(-109, "Missing parameter")
    a = args[i]
    if isinstance(a, Block):
        raise ScpiError(-104, "Data type error")
    v = choices.get(a.strip().upper())
    if v is None:
        raise ScpiError(-224, f"Illegal parameter value {a[:20]!r}")
    return v


_ON_OFF = {"ON": True, "1": True, "OFF": False, "0": False}


# ======================================================================================
# the simulated bench
# ======================================================================================
@dataclass
class SimSettings:
    """Settings of the simulated bench (the command-line options)."""

    device: DeviceModel
    clock_ppm: float = 0.0
    latency_samples: int = 64
    noise_dbfs: float | None = None
    full_scale_volts: float = 1.0
    max_vpp: float = 10.0
    command_gap_s: float = 0.002
    reply_delay_s: float = 0.0
    misbehave: str | None = None
    misbehave_on: str = "FETC"
    misbehave_instrument: str = "any"
    slow_s: float = 30.0
    seed: int = 1
    max_points: int = DEFAULT_MAX_POINTS


class _Instrument:
    """Common part: error queue, IEEE 488.2 commands, dispatch."""

    role = "instrument"

    def __init__(self, bench: "Bench", idn: str):
        self.bench = bench
        self.idn = idn
        self.errors: deque = deque()
        self.esr = 0
        self.commands: list[tuple[re.Pattern, object]] = []
        self._add("*IDN?", lambda a: self.idn)
        self._add("*RST", lambda a: self.reset())
        self._add("*CLS", lambda a: self.clear_status())
        self._add("*OPC?", lambda a: self.opc_query())
        self._add("*OPC", lambda a: None)
        self._add("*WAI", lambda a: None)
        self._add("*ESR?", lambda a: self._esr())
        self._add("SYSTem:ERRor[:NEXT]?", lambda a: self.next_error())
        self.reset()

    def _add(self, spec: str, fn) -> None:
        self.commands.append((compile_header(spec), fn))

    def push_error(self, code: int, text: str) -> None:
        if len(self.errors) >= ERROR_QUEUE_LENGTH:
            self.errors[-1] = (-350, "Queue overflow")
            return
        self.errors.append((int(code), str(text)))
        self.esr |= 0x20 if -199 <= code <= -100 else 0x10

    def next_error(self) -> str:
        if not self.errors:
            return '0,"No error"'
        code, text = self.errors.popleft()
        return f'{code},"{text}"'

    def _esr(self) -> str:
        v, self.esr = self.esr, 0
        return str(v)

    def clear_status(self) -> None:
        self.errors.clear()
        self.esr = 0

    def reset(self) -> None:  # pragma: no cover - overridden
        pass

    def opc_query(self) -> str:
        return "1"

    def execute(self, unit: bytes):
        """Run one program unit; returns the reply (str, bytes or None)."""
        m = re.match(rb"\s*([^\s]+)\s*(.*)", unit, re.S)
        if not m:
            return None
        try:
            header = m.group(1).decode("ascii")
        except UnicodeDecodeError:
            raise ScpiError(-102, "Syntax error; non-ASCII header") from None
        for pattern, fn in self.commands:
            if pattern.fullmatch(header):
                args = parse_args(m.group(2))
                return fn(args)
        raise ScpiError(-113, f"Undefined header; {header[:40]}")


class Generator(_Instrument):
    role = "generator"

    def __init__(self, bench: "Bench", idn: str):
        super().__init__(bench, idn)
        funcs = {"SIN": "SIN", "SINUSOID": "SIN", "ARB": "ARB", "ARBITRARY": "ARB"}
        self._add("[SOURce:]FUNCtion[:SHAPe]", lambda a: setattr(self, "func", _word(a, funcs)))
        self._add("[SOURce:]FUNCtion[:SHAPe]?", lambda a: self.func)
        self._add("[SOURce:]FREQuency[:CW]", self._set_freq)
        self._add("[SOURce:]FREQuency[:CW]?", lambda a: repr(float(self.freq_hz)))
        self._add("[SOURce:]VOLTage[:AMPLitude]", self._set_vpp)
        self._add("[SOURce:]VOLTage[:AMPLitude]?", lambda a: repr(float(self.vpp)))
        self._add("[SOURce:]VOLTage:OFFSet", self._set_offset)
        self._add("[SOURce:]VOLTage:OFFSet?", lambda a: repr(float(self.offset_v)))
        self._add("OUTPut[:STATe]", self._set_output)
        self._add("OUTPut[:STATe]?", lambda a: "1" if self.output else "0")
        self._add("[SOURce:]DATA:ARBitrary", self._upload)
        self._add("[SOURce:]DATA:VOLatile:CLEar", lambda a: self.arbs.clear())
        self._add("[SOURce:]FUNCtion:ARBitrary", self._select)
        self._add("[SOURce:]FUNCtion:ARBitrary?", lambda a: f'"{self.arb_name or ""}"')
        self._add("[SOURce:]FUNCtion:ARBitrary:SRATe", self._set_srate)
        self._add("[SOURce:]FUNCtion:ARBitrary:SRATe?", lambda a: repr(float(self.srate or 0.0)))
        self._add("[SOURce:]FUNCtion:ARBitrary:POINts?", lambda a: str(0 if self._arb() is None else self._arb().size))
        self._add("[SOURce:]BURSt:MODE", lambda a: setattr(self, "burst_mode", _word(a, {"TRIG": "TRIG", "TRIGGERED": "TRIG"})))
        self._add("[SOURce:]BURSt:NCYCles", self._set_ncycles)
        self._add("[SOURce:]BURSt:STATe", lambda a: setattr(self, "burst", _word(a, _ON_OFF)))
        self._add("TRIGger:SOURce", lambda a: setattr(self, "trig_source", _word(a, {"BUS": "BUS"})))
        self._add("*TRG", lambda a: self.trigger())
        self._add("TRIGger[:IMMediate]", lambda a: self.trigger())

    def reset(self) -> None:
        self.func = "SIN"
        self.freq_hz = 1000.0
        self.vpp = 0.1
        self.offset_v = 0.0
        self.output = False
        self.arbs: dict[str, np.ndarray] = {}
        self.arb_name: str | None = None
        self.srate: float | None = None
        self.burst_mode = "TRIG"
        self.burst = True
        self.ncycles = 1
        self.trig_source = "BUS"
        self.sine_phase = 0.0

    def _arb(self) -> np.ndarray | None:
        return self.arbs.get(self.arb_name or "")

    def _peak_v(self, vpp: float, offset: float, func: str | None = None) -> float:
        return abs(offset) + vpp / 2.0

    def _set_freq(self, a) -> None:
        f = _number(a)
        if not 0.0 < f <= 50e6:
            raise ScpiError(-222, f"Data out of range; frequency {f:g} Hz")
        self.freq_hz = f
        self.sine_phase = float(self.bench.rng.uniform(0, 2 * np.pi))   # not phase-continuous

    def _set_vpp(self, a) -> None:
        v = _number(a)
        if not 0.0 <= v or self._peak_v(v, self.offset_v) > self.bench.settings.max_vpp / 2 + 1e-12:
            raise ScpiError(-222, f"Data out of range; amplitude {v:g} Vpp (maximum "
                                  f"{self.bench.settings.max_vpp:g} Vpp including the offset)")
        self.vpp = v

    def _set_offset(self, a) -> None:
        v = _number(a)
        if self._peak_v(self.vpp, v) > self.bench.settings.max_vpp / 2 + 1e-12:
            raise ScpiError(-222, f"Data out of range; offset {v:g} V")
        self.offset_v = v

    def _set_output(self, a) -> None:
        self.output = _word(a, _ON_OFF)

    def _set_srate(self, a) -> None:
        v = _number(a)
        if not 1.0 <= v <= 1e9:
            raise ScpiError(-222, f"Data out of range; sample rate {v:g}")
        self.srate = v

    def _set_ncycles(self, a) -> None:
        n = _number(a, integer=True)
        if n != 1:
            raise ScpiError(-221, "Settings conflict; only single-cycle bursts are simulated")
        self.ncycles = n

    def _upload(self, a) -> None:
        if len(a) < 2:
            raise ScpiError(-109, "Missing parameter; DATA:ARB <name>,<block>")
        name, blk = a[0], a[1]
        if isinstance(name, Block) or not isinstance(blk, Block):
            raise ScpiError(-104, "Data type error; DATA:ARB <name>,<block>")
        if len(a) > 2:
            raise ScpiError(-108, "Parameter not allowed")
        if len(blk.data) % 4:
            raise ScpiError(-161, f"Invalid block data; {len(blk.data)} bytes is not a whole number of float32 samples")
        x = np.frombuffer(blk.data, dtype="<f4").astype(np.float64)
        if x.size < 2:
            raise ScpiError(-161, "Invalid block data; fewer than 2 samples")
        if x.size > self.bench.settings.max_points:
            raise ScpiError(-223, f"Too much data; {x.size} points, at most {self.bench.settings.max_points}")
        if not np.all(np.isfinite(x)) or np.max(np.abs(x)) > 1.0 + 1e-6:
            raise ScpiError(-222, "Data out of range; waveform samples must lie in -1..+1")
        self.arbs[name.strip().upper()] = x

    def _select(self, a) -> None:
        if not a or isinstance(a[0], Block):
            raise ScpiError(-109, "Missing parameter")
        name = a[0].strip().upper()
        if name not in self.arbs:
            raise ScpiError(-224, f"Illegal parameter value; no waveform named {a[0][:20]!r}")
        self.arb_name = name

    def trigger(self) -> None:
        if self.func != "ARB":
            raise ScpiError(-221, "Settings conflict; a trigger plays the arbitrary waveform (FUNC ARB)")
        if self._arb() is None:
            raise ScpiError(-221, "Settings conflict; no arbitrary waveform selected")
        if not self.srate:
            raise ScpiError(-221, "Settings conflict; arbitrary sample rate not set")
        self.bench.generator_triggered()


class Digitizer(_Instrument):
    role = "digitizer"

    def __init__(self, bench: "Bench", idn: str):
        super().__init__(bench, idn)
        self._add("ACQuire:SRATe", self._set_srate)
        self._add("ACQuire:SRATe?", lambda a: repr(float(self.srate or 0.0)))
        self._add("ACQuire:POINts", self._set_points)
        self._add("ACQuire:POINts?", lambda a: str(self.points))
        self._add("TRIGger:SOURce", lambda a: setattr(self, "trig_source", _word(
            a, {"EXT": "EXT", "EXTERNAL": "EXT", "IMM": "IMM", "IMMEDIATE": "IMM"})))
        self._add("TRIGger:SOURce?", lambda a: self.trig_source)
        self._add("INITiate[:IMMediate]", lambda a: self.bench.digitizer_init())
        self._add("ABORt", lambda a: self.abort())
        self._add("FETCh:WAVeform?", self._fetch)

    def reset(self) -> None:
        self.srate: float | None = None
        self.points = 1000
        self.trig_source = "IMM"
        self.armed = False          # armed and waiting for a trigger, or acquiring
        self.acquiring = False
        self.data: tuple[np.ndarray, np.ndarray] | None = None

    def abort(self) -> None:
        if not self.acquiring:
            self.armed = False

    def _set_srate(self, a) -> None:
        v = _number(a)
        if not 1.0 <= v <= 1e9:
            raise ScpiError(-222, f"Data out of range; sample rate {v:g}")
        self.srate = v

    def _set_points(self, a) -> None:
        n = _number(a, integer=True)
        if not 2 <= n <= self.bench.settings.max_points:
            raise ScpiError(-222, f"Data out of range; {n} points")
        self.points = int(n)

    def opc_query(self) -> str:
        # answer only when no acquisition is pending (armed and waiting for a trigger)
        with self.bench.cond:
            while self.armed and not self.bench.stopping:
                self.bench.cond.wait(0.2)
        return "1"

    def _fetch(self, a) -> bytes:
        ch = _word(a, {"CH1": 0, "CHAN1": 0, "CHANNEL1": 0, "1": 0, "CH2": 1, "CHAN2": 1, "CHANNEL2": 1, "2": 1})
        if self.data is None or self.armed:
            raise ScpiError(-230, "Data corrupt or stale; no completed acquisition")
        return ieee_block(np.asarray(self.data[ch], dtype="<f4").tobytes())


class Bench:
    """Generator + board + digitizer, shared by the two servers."""

    def __init__(self, settings: SimSettings):
        self.settings = settings
        self.lock = threading.RLock()
        self.cond = threading.Condition(self.lock)
        self.stopping = False
        self.rng = np.random.default_rng(settings.seed)
        v = _version()
        sid = f"{settings.seed:04d}"
        self.generator = Generator(self, f"{SIM_MANUFACTURER},HSG-2 arbitrary generator (simulated),SIM-G-{sid},{v}")
        self.digitizer = Digitizer(self, f"{SIM_MANUFACTURER},HSD-2 two-channel digitizer (simulated),SIM-D-{sid},{v}")
        self._boards: dict[float, SimulatedBoard] = {}
        self._compute = threading.Lock()           # one acquisition simulated at a time
        imp = dataclasses.replace(settings.device.imperfections, clock_offset_ppm=float(settings.clock_ppm))
        self.device = dataclasses.replace(settings.device, imperfections=imp)

    def board(self, fs: float) -> SimulatedBoard:
        b = self._boards.get(fs)
        if b is None:
            try:
                b = SimulatedBoard(self.device, fs, reference_channel=True,
                                   chain_latency_samples=int(self.settings.latency_samples),
                                   seed=int(self.settings.seed))
            except HarnessError as exc:
                raise ScpiError(-221, f"Settings conflict; the simulated board cannot run at {fs:g} Sa/s ({exc})") from None
            self._boards[fs] = b
        return b

    def _rates(self) -> float:
        g, d = self.generator, self.digitizer
        if not d.srate:
            raise ScpiError(-221, "Settings conflict; digitizer sample rate not set (ACQ:SRAT)")
        if g.func == "ARB" and g.srate and abs(g.srate - d.srate) > 1e-9 * d.srate:
            raise ScpiError(-221, f"Settings conflict; the simulation needs the generator's sample rate "
                                  f"({g.srate:g}) equal to the digitizer's ({d.srate:g}) (nominally)")
        return float(d.srate)

    def _capture(self, played_volts: np.ndarray, skip: int, n: int, fs: float) -> tuple[np.ndarray, np.ndarray]:
        """Run the board on `played_volts` (generator samples, volts); return ``n``
        digitizer samples (volts) of both channels from index `skip` on."""
        s = self.settings
        x = np.asarray(played_volts, dtype=float) / s.full_scale_volts
        need = skip + n
        cap = self.board(fs).play_and_capture(x[:need], extra_samples=max(0, need - min(x.size, need)))
        y, r = cap.response[skip:skip + n], cap.reference[skip:skip + n]
        if s.noise_dbfs is not None:
            sigma = 10.0 ** (s.noise_dbfs / 20.0)
            y = y + sigma * self.rng.standard_normal(y.size)
            r = r + sigma * self.rng.standard_normal(r.size)
        y, r = np.clip(y, -1.0, 1.0), np.clip(r, -1.0, 1.0)
        return y * s.full_scale_volts, r * s.full_scale_volts

    def _acquire(self, played_volts: np.ndarray, skip: int, n: int, fs: float) -> None:
        """Start an acquisition in the background, as an instrument acquires while it
        keeps answering: the digitizer stays busy (``*OPC?`` does not answer, FETCh
        has no data) until the simulation has produced the samples."""
        d = self.digitizer
        self.board(fs)                  # a rate the board cannot run at fails here, in the command
        d.armed = True
        d.data = None

        def work():
            try:
                with self._compute:
                    data = self._capture(played_volts, skip, n, fs)
            except Exception as exc:   # pragma: no cover - a simulation bug becomes an error entry
                data = None
                with self.cond:
                    d.push_error(-200, f"Execution error; acquisition failed: {exc}"[:200])
            with self.cond:
                d.data = data
                d.armed = False
                self.cond.notify_all()

        threading.Thread(target=work, daemon=True).start()

    def generator_triggered(self) -> None:
        g, d = self.generator, self.digitizer
        with self.cond:
            if not (d.armed and d.trig_source == "EXT" and not d.acquiring):
                return                       # the waveform plays; nobody records it
            fs = self._rates()
            w = g._arb()
            volts = (w * g.vpp / 2.0 + g.offset_v) if g.output else np.zeros(w.size)
            d.acquiring = True
            self._acquire(volts, 0, d.points, fs)

    def digitizer_init(self) -> None:
        g, d = self.generator, self.digitizer
        with self.cond:
            if d.armed:
                raise ScpiError(-213, "Init ignored; an acquisition is in progress")
            d.data = None
            d.acquiring = False
            if d.trig_source == "EXT":
                d.armed = True
                return
            fs = self._rates()
            gap = int(self.settings.latency_samples) + int(round(self.settings.command_gap_s * fs))
            n = gap + d.points
            if g.output and g.func == "SIN":
                if g.freq_hz >= fs / 2:
                    raise ScpiError(-221, f"Settings conflict; {g.freq_hz:g} Hz is not below half the "
                                          f"digitizer's sample rate")
                t = np.arange(n, dtype=float)
                volts = g.vpp / 2.0 * np.sin(2.0 * np.pi * g.freq_hz * t / fs + g.sine_phase) + g.offset_v
            else:
                volts = np.full(n, g.offset_v if g.output else 0.0)
            d.acquiring = True
            self._acquire(volts, gap, d.points, fs)


# ======================================================================================
# TCP servers
# ======================================================================================
def _garbage(rng: np.random.Generator) -> bytes:
    """Bytes that are neither a text reply nor a valid block."""
    return b"#9\xff\xfe" + bytes(rng.integers(128, 256, 40, dtype=np.uint8)) + b"\n"


class _Handler(socketserver.BaseRequestHandler):
    def handle(self) -> None:
        server: _InstrumentServer = self.server      # type: ignore[assignment]
        inst, bench = server.instrument, server.bench
        s = bench.settings
        sock: socket.socket = self.request
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.settimeout(0.5)
        buf = bytearray()
        while not bench.stopping:
            msg, used = next_message(buf)
            if msg is None:
                if len(buf) > MAX_MESSAGE_BYTES:
                    with bench.lock:
                        inst.push_error(-223, "Too much data; message too long")
                    return
                try:
                    chunk = sock.recv(1 << 16)
                except socket.timeout:
                    continue
                except OSError:
                    return
                if not chunk:
                    return
                buf.extend(chunk)
                continue
            del buf[:used]
            for unit in split_message(msg):
                header = unit.split(None, 1)[0].decode("ascii", "replace").lstrip(":").upper() if unit.split() else ""
                bad = (s.misbehave is not None and s.misbehave_instrument in ("any", inst.role)
                       and header.startswith(s.misbehave_on.lstrip(":").upper()))
                if bad and s.misbehave == "drop":
                    try:
                        sock.shutdown(socket.SHUT_RDWR)
                    except OSError:
                        pass
                    sock.close()
                    return
                if bad and s.misbehave == "slow":
                    t_end = time.monotonic() + s.slow_s
                    while time.monotonic() < t_end and not bench.stopping:
                        time.sleep(0.05)
                reply = None
                if bad and s.misbehave == "error":
                    with bench.lock:
                        inst.push_error(-200, "Execution error; simulated fault")
                try:
                    if header.startswith("*OPC?") and inst.role == "digitizer":
                        reply = inst.opc_query()          # waits without holding the lock
                    else:
                        with bench.lock:
                            reply = inst.execute(unit)
                except ScpiError as exc:
                    with bench.lock:
                        inst.push_error(exc.code, exc.text)
                    reply = None
                except Exception as exc:  # a bug in the simulation must not kill the server
                    with bench.lock:
                        inst.push_error(-200, f"Execution error; {type(exc).__name__}: {exc}"[:200])
                    reply = None
                if reply is None and not (bad and s.misbehave == "garbage"):
                    continue
                if bad and s.misbehave == "garbage":
                    data = _garbage(bench.rng)
                elif isinstance(reply, bytes):
                    data = reply + b"\n"
                else:
                    data = str(reply).encode("ascii") + b"\n"
                if s.reply_delay_s > 0:
                    time.sleep(s.reply_delay_s)
                try:
                    sock.sendall(data)
                except OSError:
                    return


class _InstrumentServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True

    def __init__(self, addr, instrument: _Instrument, bench: Bench):
        self.instrument = instrument
        self.bench = bench
        super().__init__(addr, _Handler)


@dataclass
class RunningServer:
    """Two instrument servers running in background threads (see `start_servers`)."""

    bench: Bench
    servers: list
    threads: list = field(default_factory=list)
    host: str = "127.0.0.1"

    @property
    def generator_port(self) -> int:
        return int(self.servers[0].server_address[1])

    @property
    def digitizer_port(self) -> int:
        return int(self.servers[1].server_address[1])

    def resource(self, which: str) -> str:
        port = self.generator_port if which == "generator" else self.digitizer_port
        return f"TCPIP::{self.host}::{port}::SOCKET"

    def stop(self) -> None:
        with self.bench.cond:
            self.bench.stopping = True
            self.bench.cond.notify_all()
        for s in self.servers:
            s.shutdown()
            s.server_close()


def start_servers(settings: SimSettings, *, host: str = "127.0.0.1", port: int = 0,
                  digitizer_port: int | None = None) -> RunningServer:
    """Start the generator and digitizer servers in background threads.

    Parameters
    ----------
    settings : SimSettings
    host : str
        Address to listen on (default loopback only).
    port : int
        Generator port (0: any free port).
    digitizer_port : int, optional
        Digitizer port (default ``port + 1``, or any free port when `port` is 0).
    """
    bench = Bench(settings)
    if digitizer_port is None:
        digitizer_port = port + 1 if port else 0
    servers = [_InstrumentServer((host, port), bench.generator, bench),
               _InstrumentServer((host, digitizer_port), bench.digitizer, bench)]
    run = RunningServer(bench, servers, host=host)
    for s in servers:
        t = threading.Thread(target=s.serve_forever, kwargs={"poll_interval": 0.1}, daemon=True)
        t.start()
        run.threads.append(t)
    return run


# ======================================================================================
# command line
# ======================================================================================
def add_arguments(p: argparse.ArgumentParser) -> None:
    """Options of the server (shared by ``python -m`` and ``harness instrument-server``)."""
    p.add_argument("--device", required=True, help="device model TOML of the simulated board (fixtures/dut-*.toml)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=5025, help="generator TCP port (0: any free port; default 5025)")
    p.add_argument("--digitizer-port", type=int, default=None,
                   help="digitizer TCP port (default: --port + 1, or any free port with --port 0)")
    p.add_argument("--clock-ppm", type=float, default=None,
                   help="digitizer clock offset vs the generator, ppm (default: the device model's clock_offset_ppm)")
    p.add_argument("--latency-samples", type=int, default=64, help="trigger-path latency, samples (default 64)")
    p.add_argument("--noise-dbfs", type=float, default=None, help="extra white noise on both digitizer inputs, dBFS rms")
    p.add_argument("--full-scale-volts", type=float, default=1.0, help="volts of the simulation's full scale (default 1)")
    p.add_argument("--max-vpp", type=float, default=10.0, help="generator amplitude limit, Vpp (default 10)")
    p.add_argument("--command-gap-s", type=float, default=0.002,
                   help="time between a frequency change and an immediate capture, s (default 0.002)")
    p.add_argument("--reply-delay-s", type=float, default=0.0, help="delay before every reply, s")
    p.add_argument("--misbehave", choices=MISBEHAVIOURS, default=None, help="misbehave on matching commands")
    p.add_argument("--on", dest="misbehave_on", default="FETC",
                   help="header prefix the misbehaviour applies to (default FETC)")
    p.add_argument("--instrument", dest="misbehave_instrument", choices=INSTRUMENTS, default="any",
                   help="which instrument misbehaves (default any)")
    p.add_argument("--slow-s", type=float, default=30.0, help="reply delay of --misbehave slow, s (default 30)")
    p.add_argument("--seed", type=int, default=1, help="seed of the noise streams (default 1)")
    p.add_argument("--max-lifetime-s", type=float, default=0.0, help="stop after this many seconds (0: never)")


def run_from_args(args) -> int:
    """Start the servers from parsed options, print the READY line, serve until
    interrupted (or ``--max-lifetime-s``)."""
    device = load_device_model(args.device)
    ppm = device.imperfections.clock_offset_ppm if args.clock_ppm is None else args.clock_ppm
    if args.full_scale_volts <= 0 or args.max_vpp <= 0:
        raise HarnessError("--full-scale-volts and --max-vpp must be positive")
    settings = SimSettings(device=device, clock_ppm=float(ppm), latency_samples=max(0, args.latency_samples),
                           noise_dbfs=args.noise_dbfs, full_scale_volts=args.full_scale_volts,
                           max_vpp=args.max_vpp, command_gap_s=max(0.0, args.command_gap_s),
                           reply_delay_s=max(0.0, args.reply_delay_s), misbehave=args.misbehave,
                           misbehave_on=args.misbehave_on, misbehave_instrument=args.misbehave_instrument,
                           slow_s=args.slow_s, seed=args.seed)
    try:
        run = start_servers(settings, host=args.host, port=args.port, digitizer_port=args.digitizer_port)
    except OSError as exc:
        raise HarnessError(f"cannot listen on {args.host}:{args.port}: {exc.strerror or exc}") from None
    print(f"READY generator={run.resource('generator')} digitizer={run.resource('digitizer')}", flush=True)
    t_end = time.monotonic() + args.max_lifetime_s if args.max_lifetime_s > 0 else None
    try:
        while t_end is None or time.monotonic() < t_end:
            time.sleep(0.2)
    except KeyboardInterrupt:
        pass
    finally:
        run.stop()
    return 0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m harness.instrument_server",
                                description="Simulated generator + two-channel digitizer with a simulated board "
                                            "between them, over TCP (SCPI raw sockets).")
    add_arguments(p)
    args = p.parse_args(argv)
    try:
        return run_from_args(args)
    except HarnessError as exc:
        print(f"instrument-server: error: {exc}", file=sys.stderr)
        return exc.exit_code


if __name__ == "__main__":
    sys.exit(main())
