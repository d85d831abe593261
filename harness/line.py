"""Production-line mode: `harness line PROFILE --station STATION`.

A loop for an operator (or a script): read a serial number, measure the unit, show the
verdict large with the worst point and its margin, the running count and yield; retest
a unit that did not pass as the retest policy allows; record every attempt in the
results store (`harness.store`) and never lose one.

Serial numbers come from the keyboard (typed, or a barcode scanner acting as a
keyboard), from a serial-port scanner (pyserial), or from a file (``--serials``, an
unattended run). Machine-readable output (``--json``): one JSON object per line on
stdout, the human display on stderr.

Retest policy (command line > station ``[line]`` > profile ``[line]`` > default)::

    [line]
    retests = 1                     # retests allowed after a non-pass verdict (0..10)
    retest_on = ["fail", "inconclusive", "invalid"]
    retest_mode = "prompt"          # prompt (operator reseats the board) | immediate

Station-only keys of ``[line]``: ``require_operator``, ``require_lot`` (default true),
``duplicates`` ("refuse" | "record"), ``plots`` ("not-pass" | "always" | "never"),
``serial_pattern`` (a regular expression every serial must match), ``golden`` (a
golden-unit file of `harness.golden`: the golden unit is measured and must verify the
station before the first unit), ``stop_after_invalid`` (consecutive invalid attempts
that stop the line, default 3), and ``[line.simulate]`` for simulated
stations (the lot each serial's board is drawn from: ``seed``, ``out_of_tolerance``,
``contact_fault`` and any spread key of `harness.device.DEFAULT_SPREAD`).

Counting (per line session): a unit is a serial number; first-pass yield is the share
of units whose first attempt passed, yield the share whose last attempt passed.

Exit codes of the loop: 0 every unit passed, 1 at least one unit finally did not pass,
4 the line stopped for a station problem (calibration expired, golden unit failed,
repeated invalid measurements, store unreachable), 2 configuration error.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import re
import signal
import sys
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Iterator

from harness.errors import EXIT_FAIL, EXIT_INVALID, EXIT_PASS, ConfigError, HarnessError, InvalidMeasurement

VERDICTS = ("pass", "fail", "inconclusive", "invalid")
RETEST_MODES = ("prompt", "immediate")
DUPLICATES = ("refuse", "record")
PLOTS = ("not-pass", "always", "never")
MAX_SERIAL_LEN = 64

LINE_CAUTION = ("CAUTION: the station plays real signals into the board under test; keep speakers and "
                "headphones off the measurement outputs, do not touch or swap boards while a unit is "
                "measured, and handle mains-powered boards under your plant's electrical-safety rules.")


# --------------------------------------------------------------------------------------
# configuration
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SimulateConfig:
    """``[line.simulate]``: how a simulated station draws each serial's board."""

    seed: int = 1
    spread: dict = field(default_factory=dict)
    out_of_tolerance: float = 0.05
    contact_fault: float = 0.0


@dataclass(frozen=True)
class RetestPolicy:
    retests: int = 1
    retest_on: tuple = ("fail", "inconclusive", "invalid")
    mode: str = "prompt"

    def describe(self) -> str:
        if self.retests == 0:
            return "no retests"
        return (f"up to {self.retests} retest{'s' if self.retests > 1 else ''} after "
                f"{', '.join(self.retest_on)} ({self.mode}); every attempt is kept")


@dataclass(frozen=True)
class LineConfig:
    """The ``[line]`` section (station file; the retest keys also in a profile)."""

    retests: int | None = None
    retest_on: tuple | None = None
    retest_mode: str | None = None
    require_operator: bool = True
    require_lot: bool = True
    duplicates: str = "refuse"
    plots: str = "not-pass"
    serial_pattern: str | None = None
    golden: Path | None = None
    stop_after_invalid: int = 3
    simulate: SimulateConfig | None = None
    source: str | None = None


_RETEST_KEYS = ("retests", "retest_on", "retest_mode")
_STATION_KEYS = _RETEST_KEYS + ("require_operator", "require_lot", "duplicates", "plots", "serial_pattern",
                                "golden", "stop_after_invalid", "simulate")


def _parse_retest(table) -> dict:
    out = {}
    if table.has("retests"):
        out["retests"] = table.int("retests", min=0, max=10)
    if table.has("retest_on"):
        v = table.data["retest_on"]
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise table.error("retest_on", "must be an array of verdicts, e.g. [\"fail\", \"invalid\"]")
        for i, x in enumerate(v):
            if x not in ("fail", "inconclusive", "invalid"):
                raise table.error(f"retest_on[{i}]", f"unknown verdict {x!r}; expected fail, inconclusive or invalid")
        out["retest_on"] = tuple(dict.fromkeys(v))
    if table.has("retest_mode"):
        out["retest_mode"] = table.str("retest_mode", choices=RETEST_MODES)
    return out


def parse_config(table, *, base_dir: Path, station_id: str, backend: str) -> LineConfig:
    """Validate a station's ``[line]`` table (see the module docstring)."""
    from harness.device import DEFAULT_SPREAD

    table.check_known(_STATION_KEYS)
    kw = _parse_retest(table)
    pattern = table.str("serial_pattern", None)
    if pattern is not None:
        try:
            re.compile(pattern)
        except re.error as exc:
            raise table.error("serial_pattern", f"not a regular expression ({exc})") from None
    golden = table.str("golden", None)
    sim = None
    st = table.table("simulate", None)
    if st is not None:
        if backend != "simulated":
            raise table.error("simulate", f"only a simulated station draws simulated boards (backend is '{backend}')")
        st.check_known(("seed", "out_of_tolerance", "contact_fault") + tuple(DEFAULT_SPREAD))
        spread = {k: st.float(k, min=0.0) for k in DEFAULT_SPREAD if st.has(k)}
        sim = SimulateConfig(seed=st.int("seed", 1, min=0), spread=spread,
                             out_of_tolerance=st.float("out_of_tolerance", 0.05, min=0.0, max=1.0),
                             contact_fault=st.float("contact_fault", 0.0, min=0.0, max=1.0))
    return LineConfig(
        retests=kw.get("retests"), retest_on=kw.get("retest_on"), retest_mode=kw.get("retest_mode"),
        require_operator=table.bool("require_operator", True), require_lot=table.bool("require_lot", True),
        duplicates=table.str("duplicates", "refuse", choices=DUPLICATES),
        plots=table.str("plots", "not-pass", choices=PLOTS), serial_pattern=pattern,
        golden=None if golden is None else (Path(golden) if Path(golden).is_absolute() else Path(base_dir) / golden),
        stop_after_invalid=table.int("stop_after_invalid", 3, min=1, max=1000),
        simulate=sim, source=table.file)


def profile_retest_policy(profile) -> dict:
    """The retest keys of a profile's ``[line]`` table (empty when it has none)."""
    from harness.config import Table, load_toml

    if not profile.path:
        return {}
    data, _ = load_toml(profile.path)
    if "line" not in data:
        return {}
    t = Table(data, str(profile.path)).table("line")
    t.check_known(_RETEST_KEYS)
    return _parse_retest(t)


def retest_policy(profile, station_cfg: LineConfig | None, *, retests: int | None = None) -> RetestPolicy:
    """Command line > station [line] > profile [line] > defaults."""
    pol = {"retests": 1, "retest_on": ("fail", "inconclusive", "invalid"), "retest_mode": "prompt"}
    pol.update(profile_retest_policy(profile))
    if station_cfg is not None:
        pol.update({k: getattr(station_cfg, k) for k in _RETEST_KEYS if getattr(station_cfg, k) is not None})
    if retests is not None:
        if not 0 <= retests <= 10:
            raise ConfigError(None, "--retests", f"must lie in 0..10, got {retests}")
        pol["retests"] = retests
    return RetestPolicy(pol["retests"], tuple(pol["retest_on"]), pol["retest_mode"])


# --------------------------------------------------------------------------------------
# serial numbers
# --------------------------------------------------------------------------------------
def check_serial(text: str, pattern: str | None = None) -> str:
    """A cleaned serial number, or InputError-like ConfigError naming the problem.

    Leading/trailing blanks (and a scanner's CR/LF) are removed; control characters,
    more than 64 characters, or a mismatch with `pattern` are refused.
    """
    s = text.strip()
    if not s:
        raise ConfigError(None, "serial", "empty")
    if len(s) > MAX_SERIAL_LEN:
        raise ConfigError(None, "serial", f"longer than {MAX_SERIAL_LEN} characters ({len(s)})")
    if any(ord(c) < 32 or ord(c) == 127 for c in s):
        raise ConfigError(None, "serial", f"contains control characters: {s!r}")
    if pattern is not None and not re.fullmatch(pattern, s):
        raise ConfigError(None, "serial", f"{s!r} does not match the station's serial_pattern {pattern!r}")
    return s


class EndOfSerials(Exception):
    """No more serial numbers (end of file, 'q', or the operator finished)."""


class KeyboardSource:
    """Serial numbers typed or scanned by a keyboard-wedge scanner (one per line).
    An empty line, ``q`` or end of input finishes the line."""

    interactive = True

    def __init__(self, ask: Callable[[str], str] = input):
        self.ask = ask

    def next_serial(self, prompt: str) -> str:
        try:
            text = self.ask(prompt)
        except EOFError:
            raise EndOfSerials() from None
        if text.strip().lower() in ("", "q", "quit", "exit"):
            raise EndOfSerials()
        return text

    def confirm(self, prompt: str) -> str:
        try:
            return self.ask(prompt)
        except EOFError:
            return "n"


class ListSource:
    """Serial numbers from a file or a list (unattended runs): blank lines and lines
    starting with ``#`` are skipped."""

    interactive = False

    def __init__(self, serials: Iterable[str]):
        self._it: Iterator[str] = iter(serials)

    @classmethod
    def from_file(cls, path: str | Path) -> "ListSource":
        p = Path(path)
        if str(path) == "-":
            lines = sys.stdin.read().splitlines()
        else:
            try:
                lines = p.read_text(encoding="utf-8").splitlines()
            except FileNotFoundError:
                raise ConfigError(str(p), None, "serial-number file not found") from None
            except UnicodeDecodeError:
                raise ConfigError(str(p), None, "serial-number file is not UTF-8 text") from None
        return cls([ln for ln in lines if ln.strip() and not ln.lstrip().startswith("#")])

    def next_serial(self, prompt: str) -> str:
        try:
            return next(self._it)
        except StopIteration:
            raise EndOfSerials() from None

    def confirm(self, prompt: str) -> str:
        return ""


class SerialPortSource:
    """A barcode scanner on a serial port (pyserial): each scan is one line (CR and/or
    LF terminated). ``port`` is a device (``/dev/ttyACM0``, ``COM3``) or a pyserial URL
    (``loop://`` for tests). Operator answers (retest prompts) come from the keyboard."""

    interactive = True

    def __init__(self, port: str, baudrate: int = 9600, *, ask: Callable[[str], str] = input,
                 out=None, timeout_s: float = 0.2, serial_obj=None):
        self.ask = ask
        self.out = sys.stderr if out is None else out
        if serial_obj is not None:
            self.port = serial_obj
        else:
            try:
                import serial
            except ImportError:  # pragma: no cover - a declared dependency
                raise ConfigError(None, "--scanner", "needs the pyserial package") from None
            try:
                self.port = serial.serial_for_url(port, baudrate=baudrate, timeout=timeout_s)
            except (serial.SerialException, ValueError) as exc:
                raise ConfigError(None, "--scanner", f"cannot open {port}: {exc}") from None
        self._buf = b""

    def next_serial(self, prompt: str) -> str:
        print(prompt + "(scan the board's barcode; Ctrl-C finishes)", file=self.out, flush=True)
        while True:
            for sep in (b"\r\n", b"\n", b"\r"):
                if sep in self._buf:
                    line, self._buf = self._buf.split(sep, 1)
                    text = line.decode("ascii", errors="replace").strip()
                    if text:
                        return text
            chunk = self.port.read(256)
            if chunk:
                self._buf += chunk
            elif len(self._buf) > 4096:    # garbage without line ends
                self._buf = b""

    def confirm(self, prompt: str) -> str:
        try:
            return self.ask(prompt)
        except EOFError:
            return "n"

    def close(self):
        try:
            self.port.close()
        except Exception:  # noqa: BLE001
            pass


# --------------------------------------------------------------------------------------
# display
# --------------------------------------------------------------------------------------
# A 5-row block font for the verdict words (drawn here: no dependency for one banner).
_FONT = {
    "A": [" ### ", "#   #", "#####", "#   #", "#   #"],
    "B": ["#### ", "#   #", "#### ", "#   #", "#### "],
    "C": [" ####", "#    ", "#    ", "#    ", " ####"],
    "D": ["#### ", "#   #", "#   #", "#   #", "#### "],
    "E": ["#####", "#    ", "#### ", "#    ", "#####"],
    "F": ["#####", "#    ", "#### ", "#    ", "#    "],
    "I": ["#####", "  #  ", "  #  ", "  #  ", "#####"],
    "L": ["#    ", "#    ", "#    ", "#    ", "#####"],
    "N": ["#   #", "##  #", "# # #", "#  ##", "#   #"],
    "O": [" ### ", "#   #", "#   #", "#   #", " ### "],
    "P": ["#### ", "#   #", "#### ", "#    ", "#    "],
    "S": [" ####", "#    ", " ### ", "    #", "#### "],
    "U": ["#   #", "#   #", "#   #", "#   #", " ### "],
    "V": ["#   #", "#   #", "#   #", " # # ", "  #  "],
}
_COLOURS = {"pass": "\033[1;97;42m", "fail": "\033[1;97;41m", "inconclusive": "\033[1;30;43m",
            "invalid": "\033[1;97;45m", "abandoned": "\033[1;97;44m"}
_RESET = "\033[0m"


def big_word(word: str) -> list[str]:
    """`word` in 5-row block letters (letters outside the font are left blank)."""
    rows = ["", "", "", "", ""]
    for ch in word.upper():
        glyph = _FONT.get(ch, ["     "] * 5)
        for i in range(5):
            rows[i] += glyph[i] + " "
    return [r.rstrip() for r in rows]


def verdict_banner(verdict: str, colour: bool = False) -> str:
    """The verdict in block letters (coloured when `colour`), one line per row."""
    rows = big_word(verdict)
    width = max(len(r) for r in rows) + 4
    lines = [" " * width] + [f"  {r:<{width - 4}}  " for r in rows] + [" " * width]
    if colour:
        c = _COLOURS.get(verdict, "")
        return "\n".join(f"{c}{ln}{_RESET}" for ln in lines)
    return "\n".join(lines)


@dataclass
class LineCounts:
    """Running counts of a line session (units are serial numbers)."""

    attempts: int = 0
    units: dict = field(default_factory=dict)      # serial -> [verdicts in order]

    def add(self, serial: str, verdict: str) -> None:
        self.attempts += 1
        self.units.setdefault(serial, []).append(verdict)

    @property
    def n_units(self) -> int:
        return len(self.units)

    def final(self) -> dict:
        out = {v: 0 for v in VERDICTS + ("abandoned",)}
        for vs in self.units.values():
            out[vs[-1]] = out.get(vs[-1], 0) + 1
        return out

    @property
    def passed(self) -> int:
        return sum(1 for vs in self.units.values() if vs[-1] == "pass")

    @property
    def first_pass(self) -> int:
        return sum(1 for vs in self.units.values() if vs[0] == "pass")

    def yield_pct(self) -> float | None:
        return 100.0 * self.passed / self.n_units if self.n_units else None

    def fpy_pct(self) -> float | None:
        return 100.0 * self.first_pass / self.n_units if self.n_units else None

    def to_dict(self) -> dict:
        return {"units": self.n_units, "attempts": self.attempts, "final": self.final(),
                "first_pass": self.first_pass, "yield_pct": self.yield_pct(), "first_pass_yield_pct": self.fpy_pct()}


class LineUI:
    """What the operator sees (human text) and what a script reads (``--json``: one
    JSON object per line on `out`, the human text then goes to `err`)."""

    def __init__(self, out=None, err=None, *, json_lines: bool = False, colour: bool | None = None):
        out = sys.stdout if out is None else out
        err = sys.stderr if err is None else err
        self.json_lines = json_lines
        self.human = err if json_lines else out
        self.out = out
        if colour is None:
            colour = (hasattr(self.human, "isatty") and self.human.isatty() and not os.environ.get("NO_COLOR")
                      and os.environ.get("TERM") != "dumb")
        self.colour = bool(colour)

    def say(self, text: str = "") -> None:
        print(text, file=self.human, flush=True)

    def emit(self, event: str, **data) -> None:
        if self.json_lines:
            print(json.dumps({"event": event, **data}, sort_keys=True, ensure_ascii=False, default=str),
                  file=self.out, flush=True)

    def show_attempt(self, *, serial: str, attempt_no: int, max_attempts: int, result, counts: LineCounts,
                     lot: str | None, operator: str | None, duplicate: bool, seconds: float) -> None:
        v = result.verdict
        rule = "=" * 78
        self.say(rule)
        self.say(verdict_banner(v, self.colour))
        self.say(f" {serial}   attempt {attempt_no} of {max_attempts}   {v.upper()}   ({seconds:.2f} s)"
                 + ("   [DUPLICATE SERIAL]" if duplicate else ""))
        w = result.worst
        if w is not None:
            lo = "-inf" if w.get("limit_low_db") is None else f"{w['limit_low_db']:+.3f}"
            hi = "+inf" if w.get("limit_high_db") is None else f"{w['limit_high_db']:+.3f}"
            u = w.get("U_gain_db")
            self.say(f" worst point {w['frequency_hz']:.6g} Hz: gain {w['gain_db']:+.3f} dB, limits {lo} .. {hi} dB, "
                     f"margin {w['margin_db']:+.3f} dB" + (f" (U {u:.3f} dB)" if u is not None else ""))
        if v != "pass":
            for r in result.reasons[:3]:
                self.say(f"   - {r}")
        y, f = counts.yield_pct(), counts.fpy_pct()
        fin = counts.final()
        self.say(f" line: {counts.n_units} units, {fin['pass']} pass, {counts.n_units - fin['pass']} not pass, "
                 f"{counts.attempts} attempts | yield {_pct(y)}, first-pass {_pct(f)}"
                 f" | lot {lot or '-'} | operator {operator or '-'}")
        self.say(f" certificate: {result.json_path}")
        self.say(rule)


def _pct(x: float | None) -> str:
    return "-" if x is None else f"{x:.1f} %"


# --------------------------------------------------------------------------------------
# simulated boards per serial
# --------------------------------------------------------------------------------------
def _serial_seed(base: int, serial: str, salt: str = "") -> int:
    h = hashlib.sha256(f"{base}/{serial}/{salt}".encode("utf-8")).digest()
    return int.from_bytes(h[:8], "big") % (2**31 - 1)


def simulated_board_for(station, sim: SimulateConfig, serial: str, attempt_no: int):
    """The simulated board a serial number stands for: drawn from the station's nominal
    model with the lot spread (deterministic for the serial), plus, per attempt, a bad
    fixture contact with probability ``contact_fault`` (an open output: invalid)."""
    import numpy as np

    from harness.backends.simulated import SimulatedBoard
    from harness.device import generate_lot, load_device_model

    nominal = load_device_model(station.device_model)
    seed = _serial_seed(sim.seed, serial)
    rng = np.random.default_rng(seed)
    bad = 1 if rng.random() < sim.out_of_tolerance else 0
    (_, model), = generate_lot(nominal, 1, spread=sim.spread, seed=seed, serial_prefix="sim", out_of_tolerance=bad)
    model = dataclasses.replace(model, id=serial)
    a_rng = np.random.default_rng(_serial_seed(sim.seed, serial, f"attempt-{attempt_no}"))
    if sim.contact_fault and a_rng.random() < sim.contact_fault:
        model = dataclasses.replace(model, imperfections=dataclasses.replace(model.imperfections, fault="open"),
                                    note="bad fixture contact (simulated)")
    return SimulatedBoard(model, station.sample_rate_hz, reference_channel=station.reference_channel,
                          chain_latency_samples=station.chain_latency_samples,
                          seed=_serial_seed(sim.seed, serial, f"noise-{attempt_no}"))


# --------------------------------------------------------------------------------------
# golden unit
# --------------------------------------------------------------------------------------
def golden_check(golden_path, *, profile, station, backend, out_dir, plan=None, calibration=None,
                 calibration_info=None, store=None, ui=None, source=None) -> dict:
    """Measure the station's golden unit and compare it with its stored response
    (`harness.golden`); raises InvalidMeasurement (exit 4) when the station is not
    verified, so the line does not start. The golden unit's certificate is written like
    any other; the check is recorded in the store as an event (not as a unit: the golden
    unit never counts in the yield). Returns the certificate's ``golden_check``."""
    from harness.golden import load_golden
    from harness.measure import measure_unit

    g = load_golden(golden_path, profile=profile)
    if source is not None and source.interactive:
        source.confirm(f"  put the golden unit {g.serial} on the station, then Enter> ")
    res = measure_unit(profile, station, g.serial, backend=backend, out_dir=out_dir, calibration=calibration,
                       calibration_info=calibration_info, plan=plan, golden=g, write_plot="not-pass")
    check = res.certificate.get("golden_check") or {"verdict": "not verified", "reason": "no golden check made"}
    if store is not None:
        store.log_event(None, "golden-check", g.serial,
                        {"verdict": check.get("verdict"), "reason": check.get("reason"), "golden_file": str(golden_path),
                         "certificate": str(res.json_path), "unit_verdict": res.verdict})
    if check.get("verdict") != "verified":
        raise InvalidMeasurement(f"golden-unit check failed, the line does not start: {check.get('reason')} "
                                 f"(certificate {res.json_path})")
    if ui is not None:
        ui.say(f"  {check.get('reason')}")
    return check


# --------------------------------------------------------------------------------------
# the loop
# --------------------------------------------------------------------------------------
class _Interrupts:
    """Ctrl-C handling of the loop, by state:

    * ``waiting`` (for a serial number or an operator's answer): finish the line now;
    * ``measuring``: the first Ctrl-C lets the unit finish and then stops the line, a
      second one abandons the unit in flight;
    * ``critical`` (recording an attempt, everything else): only noted; the line stops
      at the next safe point, so a record is never cut in half.
    """

    def __init__(self, ui: LineUI):
        self.ui = ui
        self.state = "critical"
        self.stop_requested = False
        self._old = None

    def __enter__(self):
        try:
            self._old = signal.signal(signal.SIGINT, self._handler)
        except ValueError:            # not the main thread: default handling
            self._old = None
        return self

    def __exit__(self, *exc):
        if self._old is not None:
            signal.signal(signal.SIGINT, self._old)

    def _handler(self, signum, frame):
        if self.state == "waiting":
            self.stop_requested = True
            raise KeyboardInterrupt
        if self.state == "measuring" and self.stop_requested:
            raise KeyboardInterrupt
        if not self.stop_requested:
            self.stop_requested = True
            self.ui.say("\n*** Ctrl-C: finishing this unit, then the line stops "
                        "(Ctrl-C again while it is measured abandons it) ***")


@dataclass
class LineResult:
    """Outcome of a line session."""

    exit_code: int
    counts: LineCounts
    session_uuid: str | None
    store_url: str
    stopped_because: str | None = None


def run_line(profile_path, station_path, *, source, ui: LineUI | None = None, out_dir=None, db: str | None = None,
             lot: str | None = None, work_order: str | None = None, operator: str | None = None,
             retests: int | None = None, golden=None, signing_key=None, allow_duplicates: bool = False,
             max_units: int | None = None, backend_factory=None) -> LineResult:
    """Run a production line until the serial numbers end, the operator finishes, or a
    station problem stops it.

    Parameters
    ----------
    profile_path, station_path : the product profile and the station file.
    source : where serial numbers come from (`KeyboardSource`, `ListSource`,
        `SerialPortSource`).
    ui : display and machine-readable output (default: human text on stdout).
    out_dir : folder for certificates (default: the station's output_dir, else
        ./harness-out); the default SQLite store lives in it.
    db : store URL or SQLite file (overrides the station's ``[database]``).
    lot, work_order, operator : recorded with every attempt.
    retests : overrides the retest policy's number of retests.
    golden : golden-unit file checked before the first unit (also ``[line] golden``).
    signing_key : private key to sign certificates with (overrides ``[signing]``).
    allow_duplicates : measure a serial that already finished (recorded, flagged).
    max_units : stop after this many units.
    backend_factory : ``f(station, serial, attempt_no) -> Backend`` (tests; default:
        the station's backend, or a per-serial simulated board).
    """
    from harness import store as st
    from harness.calibration import load_calibration
    from harness.control import prepare_board
    from harness.measure import make_backend, measure_unit
    from harness.profile import load_profile
    from harness.signing import SigningConfig, fingerprint, load_private_key
    from harness.station import load_station
    from harness.stimulus import plan_for_profile

    ui = ui or LineUI()
    profile = load_profile(profile_path)
    station = load_station(station_path)
    cfg: LineConfig = station.section("line") or LineConfig()
    policy = retest_policy(profile, cfg, retests=retests)
    if signing_key is not None:
        station = dataclasses.replace(station, sections={**station.sections,
                                                         "signing": SigningConfig(Path(signing_key), "--signing-key")})
    out = Path(out_dir) if out_dir else (station.output_dir or Path("harness-out"))

    # -- who and what ------------------------------------------------------------
    def need(value, name, flag, required):
        if value is not None and str(value).strip():
            return str(value).strip()
        if not required:
            return None
        if source.interactive:
            while True:
                text = source.confirm(f"{name}: ").strip()
                if text:
                    return text
                ui.say(f"  a {name.lower()} is required by the station's [line] section")
        raise ConfigError(station.path, f"line.require_{flag}",
                          f"a {name.lower()} is required: give --{flag.replace('_', '-')}")

    operator = need(operator, "Operator", "operator", cfg.require_operator)
    lot = need(lot, "Lot", "lot", cfg.require_lot)
    work_order = work_order.strip() if work_order and work_order.strip() else None

    # -- refuse to start on a station problem ------------------------------------
    cal, cal_info = load_calibration(station)            # missing/expired/foreign: exit 4
    key = (profile.sha256, station.sample_rate_hz)
    plan = _PLANS.get(key) if profile.sha256 else None
    if plan is None:
        plan = plan_for_profile(profile, station.sample_rate_hz)
        if profile.sha256:
            _PLANS[key] = plan
    import numpy as np

    from harness.backends.base import assert_level

    assert_level(np.asarray(plan.signal()), station.max_output_dbfs)
    fp = None
    if station.section("signing") is not None:
        fp = fingerprint(load_private_key(station.section("signing").private_key).public_key())
    url = st.database_url(station.section("database"), out, db)
    store = st.open_store(url)
    shared_backend = None
    try:
        replayed = st.replay_spool(store, out)
        sim = cfg.simulate if station.backend == "simulated" else None
        if backend_factory is None:
            if sim is not None:
                def backend_factory(stn, serial, attempt_no):
                    return simulated_board_for(stn, sim, serial, attempt_no)
            else:
                shared_backend = make_backend(station)

                def backend_factory(stn, serial, attempt_no):
                    return shared_backend
    except BaseException:
        store.close()
        raise

    golden = golden or cfg.golden
    plots = {"always": True, "never": False, "not-pass": "not-pass"}[cfg.plots]
    counts = LineCounts()
    session = None
    stopped = None
    exit_code = None
    consecutive_invalid = 0

    ui.say(f"harness line: {profile.title} (profile {profile.id} rev {profile.revision or '-'})")
    ui.say(f"  station {station.id} ({station.backend}); store {store.describe()}")
    ui.say(f"  calibration: {cal_info['id'] + ', due ' + cal_info['due_utc'] if cal_info else 'reference channel (none needed)'}")
    ui.say(f"  lot {lot or '-'}, work order {work_order or '-'}, operator {operator or '-'}")
    ui.say(f"  retest policy: {policy.describe()}")
    ui.say(f"  certificates: {out}/" + (f", signed (key fingerprint {fp})" if fp else ", not signed"))
    if replayed:
        ui.say(f"  recorded {len(replayed)} attempt(s) kept from an earlier store outage")
    ui.say(f"  {LINE_CAUTION}")

    try:
        with _Interrupts(ui) as intr:
            if golden:
                ui.say(f"  golden-unit check with {golden} ...")
                gb = shared_backend if shared_backend is not None else make_backend(station)
                try:
                    golden_check(golden, profile=profile, station=station, backend=gb, out_dir=out, plan=plan,
                                 calibration=cal, calibration_info=cal_info, store=store, ui=ui, source=source)
                finally:
                    if gb is not shared_backend:
                        gb.close()
            session = store.start_session(station_id=station.id, station_file_sha256=station.sha256,
                                          profile=profile, lot=lot, work_order=work_order, operator=operator,
                                          mode="interactive" if source.interactive else "unattended")
            ui.emit("start", session=session, station=station.id, profile=profile.id,
                    profile_revision=profile.revision, lot=lot, work_order=work_order, operator=operator,
                    store=store.describe(), retests=policy.retests, signing_fingerprint=fp)
            while True:
                if max_units is not None and counts.n_units >= max_units:
                    stopped = f"{max_units} units done"
                    break
                if intr.stop_requested:
                    stopped = "stopped by the operator (Ctrl-C)"
                    break
                ui.say("")
                try:
                    intr.state = "waiting"
                    raw = source.next_serial("serial number> ")
                except EndOfSerials:
                    stopped = "no more serial numbers"
                    break
                except KeyboardInterrupt:
                    stopped = "stopped by the operator (Ctrl-C)"
                    break
                finally:
                    intr.state = "critical"
                try:
                    serial = check_serial(raw, cfg.serial_pattern)
                except ConfigError as exc:
                    ui.say(f"  !! serial refused: {exc.problem}; scan again")
                    ui.emit("refused", serial=raw, reason=exc.problem)
                    store.log_event(session, "serial-refused", raw[:MAX_SERIAL_LEN], {"reason": exc.problem})
                    continue
                prior = [a for a in store.attempts(serial=serial, profile_id=profile.id,
                                                   columns=("verdict", "station_id", "finished_utc"))
                         if a["verdict"] != "abandoned"]
                done = len(prior)
                duplicate = False
                if prior and (prior[-1]["verdict"] == "pass" or prior[-1]["verdict"] not in policy.retest_on
                              or done > policy.retests):
                    last = prior[-1]
                    why = (f"DUPLICATE SERIAL {serial}: already {done} attempt(s), last {last['verdict'].upper()} "
                           f"at station {last['station_id']} on {last['finished_utc'][:19]}Z")
                    ui.say(f"  !! {why}")
                    store.log_event(session, "duplicate", serial, {"attempts": done, "last": last["verdict"]})
                    ui.emit("duplicate", serial=serial, attempts=done, last_verdict=last["verdict"],
                            recorded=allow_duplicates or cfg.duplicates == "record")
                    if not (allow_duplicates or cfg.duplicates == "record"):
                        ui.say("     not measured (use --allow-duplicates to measure it again, e.g. after rework; "
                               "such attempts are flagged)")
                        continue
                    duplicate = True
                elif prior:
                    ui.say(f"  {serial}: retest of a unit with {done} earlier attempt(s) "
                           f"(last {prior[-1]['verdict'].upper()})")
                try:
                    board_facts = prepare_board(station, profile, serial)
                except InvalidMeasurement as exc:          # board does not answer / wrong board
                    ui.say(f"  !! {serial}: board control: {exc.reason}; not measured")
                    store.log_event(session, "board-control", serial, {"reason": exc.reason})
                    ui.emit("board-control", serial=serial, reason=exc.reason)
                    consecutive_invalid += 1
                    if consecutive_invalid >= cfg.stop_after_invalid:
                        stopped = f"{consecutive_invalid} units in a row could not be prepared: check the fixture"
                        exit_code = EXIT_INVALID
                        raise _StopLine() from None
                    continue
                first_no = done + 1
                max_attempts = max(first_no, 1 + policy.retests) if not duplicate else first_no
                attempt_no = first_no
                while True:
                    if cal is not None or cal_info is not None:
                        cal, cal_info = load_calibration(station)    # may expire during a shift
                    backend = backend_factory(station, serial, attempt_no)
                    started = st.utc_now()
                    t0 = time.perf_counter()
                    intr.state = "measuring"
                    try:
                        ident = {}
                        try:
                            ident = backend.identity()
                        except Exception:  # noqa: BLE001 - informative only
                            pass
                        result = measure_unit(profile, station, serial, backend=backend, out_dir=out,
                                              unit={"model": ident.get("model"), "firmware": ident.get("firmware"),
                                                    **board_facts},
                                              calibration=cal, calibration_info=cal_info, plan=plan, write_plot=plots)
                    except KeyboardInterrupt:
                        intr.state = "critical"
                        rec = st.Attempt({"uuid": str(uuid.uuid4()), "session_uuid": session, "serial": serial,
                                          "attempt_no": attempt_no, "lot": lot, "work_order": work_order,
                                          "operator": operator, "station_id": station.id,
                                          "station_file_sha256": station.sha256, "profile_id": profile.id,
                                          "profile_revision": profile.revision, "profile_sha256": profile.sha256,
                                          "verdict": "abandoned", "reasons": json.dumps(["abandoned by the operator "
                                                                                         "(Ctrl-C) while measuring"]),
                                          "n_points": 0, "duplicate": int(duplicate), "started_utc": started,
                                          "finished_utc": st.utc_now()}, [])
                        _record(store, rec, out, ui)
                        counts.add(serial, "abandoned")
                        store.log_event(session, "abandoned", serial, {"attempt_no": attempt_no})
                        ui.say(f"\n*** {serial}: attempt {attempt_no} ABANDONED (nothing judged); the line stops ***")
                        ui.emit("abandoned", serial=serial, attempt_no=attempt_no)
                        stopped = "unit abandoned by the operator (Ctrl-C twice)"
                        raise _StopLine() from None
                    finally:
                        intr.state = "critical"
                        if backend is not shared_backend:
                            try:
                                backend.close()
                            except Exception:  # noqa: BLE001
                                pass
                    seconds = time.perf_counter() - t0
                    rec = st.attempt_from_result(result, attempt_no=attempt_no, started_utc=started,
                                                 session_uuid=session, lot=lot, work_order=work_order,
                                                 operator=operator, duplicate=duplicate)
                    if not _record(store, rec, out, ui):
                        counts.add(serial, result.verdict)
                        stopped = "the results store is unreachable"
                        exit_code = EXIT_INVALID
                        raise _StopLine()
                    counts.add(serial, result.verdict)
                    ui.show_attempt(serial=serial, attempt_no=attempt_no, max_attempts=max_attempts, result=result,
                                    counts=counts, lot=lot, operator=operator, duplicate=duplicate, seconds=seconds)
                    w = result.worst
                    ui.emit("attempt", serial=serial, attempt_no=attempt_no, verdict=result.verdict,
                            exit_code=result.exit_code, reasons=result.reasons, duplicate=duplicate,
                            worst=None if w is None else {k: w.get(k) for k in ("frequency_hz", "gain_db", "limit_low_db",
                                                                                  "limit_high_db", "margin_db",
                                                                                  "U_gain_db")},
                            certificate=str(result.json_path), raw=str(result.raw_path),
                            certificate_sha256=rec.row["certificate_sha256"], attempt_uuid=rec.row["uuid"],
                            seconds=round(seconds, 3), counts=counts.to_dict())
                    consecutive_invalid = consecutive_invalid + 1 if result.verdict == "invalid" else 0
                    if consecutive_invalid >= cfg.stop_after_invalid:
                        stopped = (f"{consecutive_invalid} invalid measurements in a row: check the fixture, "
                                   "cables and station before going on")
                        exit_code = EXIT_INVALID
                        raise _StopLine()
                    if result.verdict == "pass" or result.verdict not in policy.retest_on \
                            or attempt_no >= max_attempts or duplicate:
                        if result.verdict != "pass":
                            ui.say(f"  >>> {serial}: {result.verdict.upper()}, put the board in the REJECT bin")
                        break
                    if intr.stop_requested:
                        ui.say(f"  {serial}: retest left open (the line stops); scan it again to retest")
                        break
                    attempt_no += 1
                    if source.interactive and policy.mode == "prompt":
                        try:
                            intr.state = "waiting"
                            ans = source.confirm(f"  RETEST {attempt_no - 1} of {policy.retests}: reseat the board, "
                                                 "then Enter (or 'n' + Enter to reject it now)> ")
                        except KeyboardInterrupt:
                            stopped = "stopped by the operator"
                            raise _StopLine() from None
                        finally:
                            intr.state = "critical"
                        if ans.strip().lower() in ("n", "no", "reject"):
                            ui.say(f"  >>> {serial}: rejected by the operator; put the board in the REJECT bin")
                            store.log_event(session, "rejected", serial, {"attempts": attempt_no - 1})
                            break
                    else:
                        ui.say(f"  retest {attempt_no - 1} of {policy.retests} ...")
    except _StopLine:
        pass
    finally:
        if shared_backend is not None:
            try:
                shared_backend.close()
            except Exception:  # noqa: BLE001
                pass
        if session is not None:
            try:
                store.log_event(session, "session-end", None, {"reason": stopped, **counts.to_dict()})
            except Exception:  # noqa: BLE001 - the attempts are already recorded
                pass
        store.close()

    if exit_code is None:
        fin = counts.final()
        exit_code = EXIT_PASS if counts.n_units == fin["pass"] else EXIT_FAIL
    _summary(ui, counts, stopped, lot, out, url)
    ui.emit("summary", stopped=stopped, exit_code=exit_code, **counts.to_dict())
    return LineResult(exit_code, counts, session, url, stopped)


class _StopLine(Exception):
    pass


_PLANS: dict = {}    # stimulus plans by (profile sha256, sample rate): one per process


def _record(store, rec, out: Path, ui: LineUI) -> bool:
    """Record an attempt; when the store fails, keep it in the spool folder and say so."""
    from sqlalchemy.exc import SQLAlchemyError

    from harness.store import spool_attempt

    try:
        store.record_attempt(rec)
        return True
    except (SQLAlchemyError, HarnessError, OSError) as exc:
        path = spool_attempt(out, rec)
        ui.say(f"!!! the results store failed ({type(exc).__name__}: {str(exc).splitlines()[0][:200]})")
        ui.say(f"!!! this attempt is kept in {path} and will be recorded when the line starts again")
        ui.emit("store-error", error=str(exc).splitlines()[0][:500], spool=str(path))
        return False


def _summary(ui: LineUI, counts: LineCounts, stopped: str | None, lot, out, url) -> None:
    from harness.store import describe_url

    fin = counts.final()
    ui.say("")
    ui.say("=" * 78)
    ui.say(f" line finished: {stopped or '-'}")
    ui.say(f" {counts.n_units} units, {counts.attempts} attempts: pass {fin['pass']}, fail {fin['fail']}, "
           f"inconclusive {fin['inconclusive']}, invalid {fin['invalid']}, abandoned {fin['abandoned']}")
    ui.say(f" yield {_pct(counts.yield_pct())}, first-pass yield {_pct(counts.fpy_pct())} (lot {lot or '-'})")
    ui.say(f" records: {out}/ ; store {describe_url(url)}")
    ui.say("=" * 78)
