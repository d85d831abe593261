"""The working parts of the harness pytest plugin (`harness.pytest_plugin`).

A firmware or board team writes ordinary pytest tests::

    def test_notch_meets_profile(compliance, simulated_board):
        board = simulated_board("notch_coeffs.json")
        result = compliance.measure("notch-profile.toml", board=board)
        result.assert_compliant()

Without options the test measures a simulated board built from the coefficients on a
built-in simulated station; with ``--harness-station FILE`` the same test measures the
unit on that station (real hardware: the ``board`` argument is then only the stand-in
used in simulation).

This module holds the objects behind the fixtures: `StationChoice` (which station the
session measures on), `make_board` (a simulated board from coefficients, a design, or
a device model file), `ComplianceSession` (measure a unit or check a design against a
profile, write the records, attach JUnit properties), `ComplianceResult` (the outcome,
with `assert_compliant` and a short certificate text as its failure message).

Everything heavy (numpy, scipy, matplotlib and the harness measurement modules) is
imported inside functions: the plugin loads in every pytest session of a project that
installs the harness, and most of those sessions never measure anything.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable

import pytest

from harness.errors import EXIT_FAIL, VERDICT_EXIT, ConfigError, HarnessError

# Sample rates the built-in simulated station chooses from (the usual audio-interface
# rates, common practice). The simulated interface is flat to 0.45 fs (its resampling
# filters roll off above; see harness.backends.simulated), so the smallest rate whose
# 0.45 fs covers the top of the mask is chosen, else the highest (the stimulus plan then
# reports the frequencies it cannot cover).
SIM_RATES_HZ = (48000.0, 96000.0, 192000.0)
USABLE_FRACTION_OF_FS = 0.45
# Built-in simulated station: the maximum output level and Type B standard uncertainties
# of a good two-input audio interface with a reference input (common practice values).
DEFAULT_MAX_OUTPUT_DBFS = -3.0
DEFAULT_TYPE_B = {"level_db": 0.02, "flatness_db": 0.01, "phase_deg": 0.1}

VERDICTS = ("pass", "fail", "inconclusive", "invalid")
PLUGIN = "harness"


# ======================================================================================
# errors
# ======================================================================================
class ComplianceFailure(AssertionError):
    """A unit or design that does not meet its profile.

    An AssertionError (so it works in plain Python too), whose message is a short
    certificate: the failing band, the worst frequency, the measured value, the limit,
    the margin, the uncertainty, the decision rule and the paths of the full records.
    ``result`` is the `ComplianceResult`.
    """

    def __init__(self, message: str, result: "ComplianceResult"):
        super().__init__(message)
        self.result = result


@contextlib.contextmanager
def clear_errors(what: str):
    """Turn a harness error (bad file, bad value, level limit, missing calibration) into
    a short pytest failure naming `what`, the file, the key and the problem: no
    traceback wall."""
    message = None
    try:
        yield
    except HarnessError as exc:
        message = f"{what}: {exc}"
    if message is not None:   # pytest.fail(message, pytrace=False) without the chained original
        raise pytest.fail.Exception(message, pytrace=False) from None


# ======================================================================================
# the station
# ======================================================================================
def _board_rate_hz(board) -> float | None:
    """Sample rate of a digital simulated board's coefficients (None: analog, or a
    digital design made for whatever rate the station runs at)."""
    if board is None:
        return None
    f = board.filter
    if f.domain != "digital":
        return None
    if f.sample_rate_hz is not None:
        return float(f.sample_rate_hz)
    return None


def choose_sample_rate_hz(profile, board=None) -> float:
    """Sample rate of the built-in simulated station for a profile (and a board).

    The rate a digital board's coefficients were made for; else a digital profile's
    sample rate; else the smallest of `SIM_RATES_HZ` whose 0.45 fs covers the top of the
    mask (and of an explicit stimulus range). A digital board and a digital profile
    made for different rates is a configuration error.

    Parameters
    ----------
    profile : harness.profile.Profile
    board : harness.device.DeviceModel, optional

    Returns
    -------
    float
        Sample rate in Hz.

    Raises
    ------
    ConfigError
        The board's coefficients and the profile are for different sample rates.
    """
    board_fs = _board_rate_hz(board)
    prof_fs = float(profile.sample_rate_hz) if (profile.digital and profile.sample_rate_hz) else None
    if board_fs is not None and prof_fs is not None and not math.isclose(board_fs, prof_fs, rel_tol=1e-9):
        raise ConfigError(board.source, "sample_rate_hz",
                          f"the board's coefficients are for {board_fs:g} Hz but profile {profile.id} "
                          f"is for {prof_fs:g} Hz; a digital filter's response in Hz depends on its "
                          "sample rate")
    if board_fs is not None:
        return board_fs
    if prof_fs is not None:
        return prof_fs
    top = float(profile.mask.f_max_hz)
    stim = profile.stimulus
    if stim.stop_hz:
        top = max(top, float(stim.stop_hz))
    if stim.frequencies_hz:
        top = max(top, max(float(x) for x in stim.frequencies_hz))
    for fs in SIM_RATES_HZ:
        if USABLE_FRACTION_OF_FS * fs >= top:
            return fs
    return SIM_RATES_HZ[-1]


def default_station(profile, board=None):
    """The built-in simulated station for `profile`: a two-input interface with a
    reference channel (no chain calibration needed), maximum output -3 dBFS, the Type B
    contributions `DEFAULT_TYPE_B`, at `choose_sample_rate_hz`.

    Returns
    -------
    harness.station.Station
    """
    from harness.station import Station
    from harness.uncertainty import TypeB

    fs = choose_sample_rate_hz(profile, board)
    return Station(id=f"sim-{fs / 1000:g}k", backend="simulated", sample_rate_hz=fs,
                   max_output_dbfs=DEFAULT_MAX_OUTPUT_DBFS, reference_channel=True,
                   type_b=TypeB(**DEFAULT_TYPE_B),
                   description="built-in simulated station of the harness pytest plugin "
                               "(reference input, no chain calibration)")


@dataclass(frozen=True)
class StationChoice:
    """Which station this pytest session measures on.

    Attributes
    ----------
    station : harness.station.Station or None
        The station file given with ``--harness-station`` (None: the built-in simulated
        station, made per profile by `for_profile`).
    path : Path or None
        That file.
    """

    station: Any = None
    path: Path | None = None

    @property
    def given(self) -> bool:
        """True when ``--harness-station`` named a station file."""
        return self.station is not None

    @property
    def hardware(self) -> bool:
        """True when the station is real hardware (its backend is not ``simulated``)."""
        return self.given and self.station.backend != "simulated"

    @property
    def simulated(self) -> bool:
        return not self.hardware

    def describe(self) -> str:
        if not self.given:
            return "built-in simulated station (no --harness-station given)"
        s = self.station
        return f"station {s.id} ({s.backend}, {s.sample_rate_hz:g} Hz) from {self.path}"

    def for_profile(self, profile, board=None):
        """The Station a measurement of `profile` runs on: the given station file, or
        the built-in simulated station (`default_station`)."""
        return self.station if self.given else default_station(profile, board)


def load_station_choice(path: str | Path | None, base_dir: Path | None = None) -> StationChoice:
    """Load ``--harness-station``: a StationChoice (ConfigError for a bad file)."""
    if not path:
        return StationChoice()
    from harness.station import load_station

    p = Path(path)
    if not p.is_absolute() and base_dir is not None:
        p = Path(base_dir) / p
    if not p.exists():
        raise ConfigError(str(path), None, "file not found" + (f" (looked in {p.parent})" if p.parent != Path(".") else ""))
    return StationChoice(station=load_station(p), path=p)


# ======================================================================================
# simulated boards
# ======================================================================================
_COEFF_EXTS = (".json", ".csv", ".txt", ".npz")
_DEVICE_EXTS = (".toml",)
_IDENTITY_FILTER = {"sos": [[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]], "sample_rate_hz": 48000.0}


def _resolve(path, base_dir: Path | None) -> Path:
    """A relative path is looked up beside the test file first, then from the current
    folder."""
    p = Path(path)
    if p.is_absolute() or base_dir is None:
        return p
    beside = Path(base_dir) / p
    return beside if beside.exists() else p


def _imperfections(base, overrides, src: str):
    """Imperfections: `base` with the keys of `overrides` (a dict, validated with the
    device-model rules and messages) or `overrides` itself (an Imperfections)."""
    from harness.device import Imperfections, parse_device_model

    if overrides is None:
        return base
    if isinstance(overrides, Imperfections):
        return overrides
    if not isinstance(overrides, dict):
        raise ConfigError(src, "imperfections", f"must be a dict or harness.device.Imperfections, "
                                                f"got {type(overrides).__name__}")
    merged = {}
    default = Imperfections()
    for f in dataclasses.fields(Imperfections):
        v = getattr(base, f.name)
        if v is not None and v != getattr(default, f.name):
            merged[f.name] = v
    merged.update(overrides)
    doc = {"device": {"id": "imperfections", "filter": dict(_IDENTITY_FILTER), "imperfections": merged}}
    try:
        return parse_device_model(doc, file=None).imperfections
    except ConfigError as exc:
        key = (exc.key or "").removeprefix("device.")
        raise ConfigError(src, key or "imperfections", exc.problem) from None


def filter_spec_from_design(design):
    """A device-model FilterSpec from a harness.design.FilterDesign: digital designs as
    second-order sections at their sample rate, analog ones as zeros/poles (rad/s)/gain."""
    from harness.device import FilterSpec

    if design.digital:
        sos = tuple(tuple(float(c) for c in row) for row in design.to_sos())
        return FilterSpec(form="sos", domain="digital", sample_rate_hz=float(design.sample_rate_hz), sos=sos)
    return FilterSpec(form="zpk", domain="analog", z=tuple(complex(c) for c in design.zeros),
                      p=tuple(complex(c) for c in design.poles), k=float(design.gain))


def design_from_board(board, sample_rate_hz: float | None):
    """A harness.design.FilterDesign of a simulated board's ideal filter (digital boards
    at their own rate, or `sample_rate_hz` for a digital design without one)."""
    from harness.design import FilterDesign

    f = board.filter
    if f.analog:
        z, p, k = f.analog_zpk()
        return FilterDesign.from_zpk(z, p, k, analog=True, id=board.id, source=board.source)
    fs = f.sample_rate_hz or sample_rate_hz
    if fs is None:
        raise ConfigError(board.source, f.key("sample_rate_hz"),
                          "a digital design without a sample rate needs the profile's sample_rate_hz")
    return FilterDesign.from_sos(f.digital_sos(fs, board.source), fs, id=board.id, source=board.source)


def make_board(source=None, *, imperfections=None, quantize: str | None = None,
               sample_rate_hz: float | None = None, analog: bool = False, sos=None, b=None, a=None,
               z=None, p=None, k=None, id: str | None = None, model: str | None = None,
               firmware: str | None = None, base_dir: Path | None = None):
    """A simulated board (harness.device.DeviceModel) from a filter description.

    Parameters
    ----------
    source : str, Path, dict, FilterDesign or DeviceModel, optional
        * a coefficient file (``.json``, ``.csv``, ``.npz``; see harness.design), e.g.
          the firmware's exported coefficients;
        * a device model file (``.toml``; see harness.device);
        * a dict: a ``[device.filter]`` table (``{"design": {...}}``, ``{"sos": [...],
          "sample_rate_hz": ...}``, ``{"ba": {...}}``, ``{"zpk": {...}}``), or a design
          table itself (``{"family": "butter", "order": 4, "cutoff_hz": 1000,
          "domain": "analog"}``);
        * a harness.design.FilterDesign or harness.device.DeviceModel.
        Relative file paths are looked up beside the test file first.
    sos, b, a, z, p, k : array_like, optional
        Coefficients given in code instead of `source` (scipy.signal conventions:
        digital sos rows ``[b0 b1 b2 a0 a1 a2]`` in powers of z^-1; analog roots in rad/s).
    sample_rate_hz : float, optional
        Sample rate of digital coefficients given in code, or for a CSV file without one.
    analog : bool
        Coefficients given in code are analog (s-domain).
    imperfections : dict or harness.device.Imperfections, optional
        Board imperfections (``gain_error_db``, ``output_noise_dbfs``,
        ``latency_samples``, ...). A dict overrides only the keys it names (of a device
        model file's own imperfections, or of an ideal board).
    quantize : str, optional
        ``"Qm.n"``: round the digital coefficients to this signed fixed-point format
        first (as the firmware stores them; see harness.design.quantize_sos). A
        coefficient that does not fit is a ConfigError, never saturated silently.
    id, model, firmware : str, optional
        Identity of the simulated unit (recorded in its certificate).
    base_dir : Path, optional
        Folder relative paths are looked up in first (the fixture passes the test's folder).

    Returns
    -------
    harness.device.DeviceModel

    Raises
    ------
    ConfigError
        Naming the file (or the argument), the key and the problem.
    """
    from harness.design import FilterDesign, load_coefficients, quantize_design
    from harness.device import DeviceModel, load_device_model, parse_device_model

    given = {n: v for n, v in (("sos", sos), ("b", b), ("a", a), ("z", z), ("p", p), ("k", k)) if v is not None}
    if source is not None and given:
        raise ConfigError(None, "simulated_board", f"give either a source or coefficients ({', '.join(given)}), not both")
    src_name = "simulated_board()"
    design = None
    device = None
    if source is None and not given:
        raise ConfigError(None, "simulated_board", "no filter given: pass a coefficient file, a device model "
                                                   "file, a filter dict, or sos=... / b=..., a=... / z=..., p=..., k=...")
    if given:
        if "sos" in given:
            if len(given) > 1:
                raise ConfigError(None, "simulated_board", "give sos alone, or b and a, or z, p and k")
            design = FilterDesign.from_sos(sos, sample_rate_hz, analog=analog, source=src_name, id=id or "")
        elif set(given) == {"b", "a"}:
            design = FilterDesign.from_ba(b, a, sample_rate_hz, analog=analog, source=src_name, id=id or "")
        elif set(given) == {"z", "p", "k"}:
            design = FilterDesign.from_zpk(z, p, k, sample_rate_hz, analog=analog, source=src_name, id=id or "")
        else:
            raise ConfigError(None, "simulated_board", f"incomplete coefficients ({', '.join(sorted(given))}): "
                                                       "give sos, or b and a, or z, p and k")
    elif isinstance(source, DeviceModel):
        device = source
    elif isinstance(source, FilterDesign):
        design = source
    elif isinstance(source, dict):
        table = source if any(key in source for key in ("design", "sos", "zpk", "ba")) else {"design": source}
        src_name = "simulated_board(filter dict)"
        device = parse_device_model({"device": {"id": id or "simulated-board", "filter": table}}, file=src_name)
    elif isinstance(source, (str, Path)):
        path = _resolve(source, base_dir)
        src_name = str(path)
        ext = path.suffix.lower()
        if ext in _DEVICE_EXTS:
            device = load_device_model(path)
        elif ext in _COEFF_EXTS:
            design = load_coefficients(path, default_sample_rate_hz=sample_rate_hz)
        elif not path.exists():
            raise ConfigError(str(path), None, "file not found")
        else:
            raise ConfigError(str(path), None, f"unknown board file type '{path.suffix}': use a coefficient file "
                                               "(.json, .csv, .npz) or a device model (.toml)")
    else:
        try:
            import numpy as np

            arr = np.asarray(source, dtype=float)
        except (TypeError, ValueError):
            arr = None
        if arr is not None and arr.ndim == 2 and arr.shape[1] == 6:
            design = FilterDesign.from_sos(arr, sample_rate_hz, analog=analog, source=src_name, id=id or "")
        else:
            raise ConfigError(None, "simulated_board", f"cannot build a board from {type(source).__name__}: pass a "
                                                       "file path, a filter dict, a FilterDesign, a DeviceModel, or "
                                                       "sos=... / b=..., a=... / z=..., p=..., k=... with sample_rate_hz")

    if quantize is not None:
        base_name = id or (device.id if device is not None else None) or design.id or (
            Path(design.source).stem if design.source and design.source != src_name else "simulated-board")
        if design is None:
            design = design_from_board(device, sample_rate_hz)
        design, rep = quantize_design(design, quantize, key="quantize")
        id = f"{base_name}-{rep.qformat.spec}"
        device_base, device = device, None
    else:
        device_base = device

    if device is None:
        from harness.device import Imperfections

        name = id or (device_base.id if device_base is not None else None) or design.id or (
            Path(design.source).stem if design.source and design.source != src_name else "simulated-board")
        base_imp = device_base.imperfections if device_base is not None else None
        device = DeviceModel(id=name, filter=filter_spec_from_design(design),
                             imperfections=base_imp or Imperfections(),
                             model=model or (device_base.model if device_base is not None else None),
                             firmware=firmware or (device_base.firmware if device_base is not None else None),
                             description=(design.title or None), source=design.source or src_name)
    else:
        changes = {k2: v for k2, v in (("id", id), ("model", model), ("firmware", firmware)) if v is not None}
        if changes:
            device = dataclasses.replace(device, **changes)
    if imperfections is not None:
        device = dataclasses.replace(device, imperfections=_imperfections(
            device.imperfections, imperfections, f"simulated_board({src_name})"))
    return device


# ======================================================================================
# results
# ======================================================================================
def _f(x) -> float | None:
    if x is None:
        return None
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def _hz(x) -> str:
    x = _f(x)
    return "?" if x is None else f"{x:.6g} Hz"


def _db(x, sign: bool = True) -> str:
    x = _f(x)
    if x is None:
        return "?"
    return f"{x:+.3f} dB" if sign else f"{x:.3f} dB"


def _limit_text(gain, low, high) -> str:
    """The limit nearest to `gain` ('>= -0.50 dB', '<= -20.00 dB', or both)."""
    lo, hi, g = _f(low), _f(high), _f(gain)
    if lo is not None and hi is not None:
        if g is not None:
            return f">= {lo:+.3f} dB" if (g - lo) < (hi - g) else f"<= {hi:+.3f} dB"
        return f"{lo:+.3f} .. {hi:+.3f} dB"
    if lo is not None:
        return f">= {lo:+.3f} dB"
    if hi is not None:
        return f"<= {hi:+.3f} dB"
    return "none"


def _band_name(b: dict) -> str:
    idx = b.get("index")
    where = "transition ceiling" if idx is not None and idx < 0 else f"band[{idx}]"
    label = f' "{b["label"]}"' if b.get("label") else ""
    kind = b.get("kind") or ""
    rng = ""
    if _f(b.get("start_hz")) is not None and _f(b.get("stop_hz")) is not None:
        rng = f" {float(b['start_hz']):.6g}..{float(b['stop_hz']):.6g} Hz"
    return f"{where}{label} ({kind}{rng})" if kind != "transition" else f"{where}{rng}"


@dataclass
class ComplianceResult:
    """Outcome of one measured unit (``kind='measurement'``) or one design check
    (``kind='design'``) against a profile.

    Attributes
    ----------
    kind : {'measurement', 'design'}
    verdict : {'pass', 'fail', 'inconclusive', 'invalid'}
    profile : dict
        ``id``, ``revision``, ``title``.
    unit : str
        Serial number (measurement) or design name (design check).
    station : str
        Where it was measured (or how the design was evaluated).
    reasons : list of str
    bands : list of dict
        Per band: ``index``, ``kind``, ``label``, ``start_hz``, ``stop_hz``,
        ``worst_margin_db``, ``worst_frequency_hz``, ``worst_gain_db``, ``U_gain_db``
        (expanded uncertainty, None for a design), ``limit_low_db``, ``limit_high_db``
        (None: no such limit), ``verdict``.
    worst : dict or None
        The point with the smallest margin: ``frequency_hz``, ``gain_db``,
        ``limit_low_db``, ``limit_high_db``, ``margin_db``, ``U_gain_db``, ``band``.
    rule : str
        Decision rule name; ``rule_text`` its statement; ``confidence`` its coverage.
    phase_reason : str
        Why the phase rule failed (empty when it passed or does not apply).
    certificate_path, report_path, plot_path, raw_path : Path or None
        The records written (JSON certificate, HTML report with the plot, PNG plot,
        raw capture).
    certificate : dict
        The full certificate (measurement) or design-check record.
    notes : list of str
    details : object
        harness.measure.UnitResult or harness.design.DesignResult.
    """

    kind: str
    verdict: str
    profile: dict
    unit: str
    station: str
    reasons: list[str] = field(default_factory=list)
    bands: list[dict] = field(default_factory=list)
    worst: dict | None = None
    rule: str = ""
    rule_text: str = ""
    confidence: float | None = None
    phase_reason: str = ""
    certificate_path: Path | None = None
    report_path: Path | None = None
    plot_path: Path | None = None
    raw_path: Path | None = None
    certificate: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    details: Any = None

    # -- construction -----------------------------------------------------------------
    @classmethod
    def from_certificate(cls, cert: dict, *, json_path=None, html_path=None, plot_path=None, raw_path=None,
                         station: str | None = None, notes: Iterable[str] = (), details=None) -> "ComplianceResult":
        """A result from a measurement certificate (DESIGN.md certificate contract)."""
        points = [p for p in cert.get("points") or [] if isinstance(p, dict)]

        def point_at(freq):
            freq = _f(freq)
            if freq is None or not points:
                return {}
            return min(points, key=lambda p: abs((_f(p.get("frequency_hz")) or math.inf) - freq))

        bands = []
        for b in cert.get("bands") or []:
            pt = point_at(b.get("worst_frequency_hz")) if b.get("worst_frequency_hz") is not None else {}
            bands.append({"index": b.get("index"), "kind": b.get("kind"), "label": b.get("label") or "",
                          "start_hz": b.get("start_hz"), "stop_hz": b.get("stop_hz"),
                          "worst_margin_db": _f(b.get("worst_margin_db")),
                          "worst_frequency_hz": _f(b.get("worst_frequency_hz")),
                          "worst_gain_db": _f(b.get("worst_gain_db")),
                          "U_gain_db": _f(b.get("U_gain_db", pt.get("U_gain_db"))),
                          "limit_low_db": _f(pt.get("limit_low_db")), "limit_high_db": _f(pt.get("limit_high_db")),
                          "verdict": str(b.get("verdict", ""))})
        worst = None
        judged = [p for p in points if _f(p.get("margin_db")) is not None]
        if judged:
            w = min(judged, key=lambda p: _f(p["margin_db"]))
            wf = _f(w.get("frequency_hz"))
            band = next((b for b in bands if b["worst_frequency_hz"] is not None and wf is not None
                         and math.isclose(b["worst_frequency_hz"], wf, rel_tol=1e-12)), None)
            if band is None and wf is not None:
                band = next((b for b in bands if _f(b["start_hz"]) is not None and _f(b["stop_hz"]) is not None
                             and float(b["start_hz"]) <= wf <= float(b["stop_hz"])), None)
            worst = {"frequency_hz": wf, "gain_db": _f(w.get("gain_db")), "margin_db": _f(w.get("margin_db")),
                     "limit_low_db": _f(w.get("limit_low_db")), "limit_high_db": _f(w.get("limit_high_db")),
                     "U_gain_db": _f(w.get("U_gain_db")), "k": _f(w.get("k_gain")),
                     "verdict": w.get("verdict"), "outcome": w.get("outcome"),
                     "band": None if band is None else band["index"]}
        prof = cert.get("profile") or {}
        dec = cert.get("decision") or {}
        unit = cert.get("unit") or {}
        st = cert.get("station") or {}
        pc = cert.get("phase_check") or {}
        if station is None:
            station = f"station {st.get('id', '?')} ({st.get('backend', '?')})"
        return cls(kind="measurement", verdict=str(cert.get("verdict", "invalid")),
                   profile={"id": prof.get("id"), "revision": prof.get("revision"), "title": prof.get("title")},
                   unit=str(unit.get("serial", "?")), station=station, reasons=list(cert.get("reasons") or []),
                   bands=bands, worst=worst, rule=str(dec.get("rule", "")), rule_text=str(dec.get("text", "")),
                   confidence=_f(dec.get("confidence")), phase_reason=str(pc.get("reason") or ""),
                   certificate_path=None if json_path is None else Path(json_path),
                   report_path=None if html_path is None else Path(html_path),
                   plot_path=None if plot_path is None else Path(plot_path),
                   raw_path=None if raw_path is None else Path(raw_path),
                   certificate=cert, notes=list(notes), details=details)

    # -- facts ------------------------------------------------------------------------
    @property
    def passed(self) -> bool:
        return self.verdict == "pass"

    @property
    def exit_code(self) -> int:
        """The command-line exit code of this verdict (0 pass, 1 fail, 3 inconclusive, 4 invalid)."""
        return VERDICT_EXIT.get(self.verdict, EXIT_FAIL)

    @property
    def worst_margin_db(self) -> float | None:
        """Smallest margin to the mask in dB (negative: outside), None when nothing was judged."""
        return None if self.worst is None else self.worst.get("margin_db")

    def band(self, key) -> dict:
        """A band by index or label."""
        for b in self.bands:
            if b["index"] == key or (isinstance(key, str) and b["label"] == key):
                return b
        raise KeyError(key)

    # -- text -------------------------------------------------------------------------
    def headline(self) -> str:
        prof = f"{self.profile.get('id')} rev {self.profile.get('revision') or '-'}"
        title = f" ({self.profile['title']})" if self.profile.get("title") else ""
        what = "design" if self.kind == "design" else "unit"
        return {
            "pass": f"PASS: {what} {self.unit} meets profile {prof}{title}",
            "fail": f"FAIL: {what} {self.unit} does not meet profile {prof}{title}",
            "inconclusive": f"INCONCLUSIVE: {what} {self.unit} cannot be shown to meet or fail profile {prof}{title}: "
                            "a result lies within its measurement uncertainty of a limit",
            "invalid": f"INVALID: {what} {self.unit} was not measured properly against profile {prof}{title}; "
                       "no verdict",
        }.get(self.verdict, f"{self.verdict.upper()}: {what} {self.unit} against profile {prof}{title}")

    def _u_text(self, u) -> str:
        if self.kind == "design":
            return "U = 0 (exact design response)"
        u = _f(u)
        if u is None:
            return "U = ?"
        cov = f" at {self.confidence * 100:g} % coverage" if self.confidence else ""
        return f"U = {u:.3f} dB{cov}"

    def _point_text(self, freq, gain, low, high, margin, u) -> str:
        word = "computed" if self.kind == "design" else "measured"
        return (f"{_hz(freq)}: {word} {_db(gain)}, limit {_limit_text(gain, low, high)}, "
                f"margin {_db(margin)}, {self._u_text(u)}")

    def summary(self, *, max_bands: int = 3) -> str:
        """A short certificate: verdict, the failing band(s) with the worst frequency,
        the value there, the limit, the margin and its uncertainty, the decision rule,
        every band's worst margin, the reasons and the paths of the full records."""
        lines = [self.headline()]
        w = 13

        def row(label, text):
            lines.append(f"  {label:<{w}}{text}")

        bad = [b for b in self.bands if b["verdict"] in ("fail", "inconclusive", "invalid")]
        if self.verdict == "pass":
            bad = []
        bad.sort(key=lambda b: (b["worst_margin_db"] if b["worst_margin_db"] is not None else math.inf))
        word = {"fail": "failing band", "inconclusive": "unsure band", "invalid": "invalid band"}
        for b in bad[:max_bands]:
            row(word.get(b["verdict"], "band"), f"{_band_name(b)}: {b['verdict'].upper()}")
            if b["worst_frequency_hz"] is not None:
                row("  worst at", self._point_text(b["worst_frequency_hz"], b["worst_gain_db"], b["limit_low_db"],
                                                   b["limit_high_db"], b["worst_margin_db"], b["U_gain_db"]))
        if len(bad) > max_bands:
            row("", f"(and {len(bad) - max_bands} more band(s), see the certificate)")
        if not bad and self.worst is not None:
            wb = self.worst.get("band")
            name = ""
            if wb is not None:
                try:
                    name = f" in {_band_name(self.band(wb))}"
                except KeyError:
                    name = ""
            row("worst point", self._point_text(self.worst["frequency_hz"], self.worst["gain_db"],
                                                self.worst["limit_low_db"], self.worst["limit_high_db"],
                                                self.worst["margin_db"], self.worst["U_gain_db"]) + name)
        if self.phase_reason:
            row("phase", self.phase_reason)
        rule = self.rule_text or self.rule
        if rule:
            row("decision", rule + (f", coverage {self.confidence:g}" if self.confidence and self.kind != "design" else ""))
        if self.bands:
            parts = []
            for b in self.bands:
                m = b["worst_margin_db"]
                parts.append(f"[{b['index']}] {b['verdict'] if b['verdict'] == 'pass' else b['verdict'].upper()} "
                             + ("" if m is None else f"{m:+.3f} dB"))
            row("all bands", " | ".join(p.strip() for p in parts) + "  (worst margin per band)")
        shown = set()
        for r in self.reasons:
            if (self.kind == "design" and r.startswith(("band ", "transition ceiling"))) or (
                    bad and r.startswith("gain ")):
                continue   # already shown band by band above
            if r not in shown and not (self.verdict == "pass" and r.startswith("every point")):
                row("reason", r)
                shown.add(r)
        for n in self.notes:
            row("note", n)
        row("station", self.station)
        if self.certificate_path:
            row("certificate", str(self.certificate_path))
        if self.report_path:
            row("report", f"{self.report_path}  (HTML, with the plot)")
        if self.plot_path:
            row("plot", str(self.plot_path))
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    # -- assertion --------------------------------------------------------------------
    def assert_compliant(self, *, accept: Iterable[str] = ("pass",)) -> "ComplianceResult":
        """Raise `ComplianceFailure` (an AssertionError) with `summary` as its message
        unless the verdict is in `accept` (default: only ``pass``; a guarded-acceptance
        ``inconclusive`` is not a pass). Returns the result for chaining."""
        __tracebackhide__ = True
        return assert_compliant(self, accept=accept)

    assert_pass = assert_compliant

    # -- JUnit ------------------------------------------------------------------------
    def junit_properties(self) -> list[tuple[str, str]]:
        """Properties for the JUnit XML report (name, value)."""
        m = self.worst_margin_db
        wf = None if self.worst is None else self.worst.get("frequency_hz")
        props = [("harness_kind", self.kind),
                 ("harness_profile", f"{self.profile.get('id')} rev {self.profile.get('revision') or '-'}"),
                 ("harness_unit", self.unit),
                 ("harness_verdict", self.verdict),
                 ("harness_worst_margin_db", "" if m is None else f"{m:.6g}"),
                 ("harness_worst_frequency_hz", "" if wf is None else f"{wf:.9g}"),
                 ("harness_certificate", "" if self.certificate_path is None else str(self.certificate_path))]
        if self.report_path:
            props.append(("harness_report", str(self.report_path)))
        if self.plot_path:
            props.append(("harness_plot", str(self.plot_path)))
        return props


def assert_compliant(result: ComplianceResult, *, accept: Iterable[str] = ("pass",)) -> ComplianceResult:
    """Assert that a measured unit or a design meets its profile.

    Parameters
    ----------
    result : ComplianceResult
        From ``compliance.measure(...)`` or ``compliance.check_design(...)``.
    accept : iterable of str
        Verdicts that count as compliant (default only ``'pass'``).

    Returns
    -------
    ComplianceResult
        `result`, when its verdict is accepted.

    Raises
    ------
    ComplianceFailure
        An AssertionError whose message is `ComplianceResult.summary`.
    """
    __tracebackhide__ = True
    accept = tuple(accept)
    bad = [v for v in accept if v not in VERDICTS]
    if bad:
        raise ValueError(f"accept: unknown verdict(s) {bad}; verdicts are {', '.join(VERDICTS)}")
    if not isinstance(result, ComplianceResult):
        raise TypeError(f"assert_compliant expects the result of compliance.measure() or "
                        f"compliance.check_design(), got {type(result).__name__}")
    if result.verdict not in accept:
        raise ComplianceFailure(result.summary(), result)
    return result


# ======================================================================================
# the session behind the `compliance` fixture
# ======================================================================================
def _safe(text: str, max_len: int = 60) -> str:
    s = re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._")
    return (s or "test")[:max_len]


class ComplianceSession:
    """Measure units and check designs against profiles inside one test.

    Made by the ``compliance`` fixture. Records go into `out_dir` (the test's
    ``tmp_path / 'harness'``, or ``--harness-out DIR / <test name>``); every result is
    attached to the JUnit XML report as properties (see
    `ComplianceResult.junit_properties`) and listed in the terminal summary.

    Parameters
    ----------
    choice : StationChoice
    out_dir : Path or callable
        Where the records go (a callable is called once, on first use).
    base_dir : Path, optional
        The test file's folder: relative profile and board paths are looked up there first.
    serial : str, optional
        ``--harness-serial``: serial number of the unit on a real station.
    record : callable, optional
        ``record(name, value)`` for JUnit properties.
    on_result : callable, optional
        Called with every result (the plugin's terminal summary).
    """

    def __init__(self, choice: StationChoice, out_dir, *, base_dir: Path | None = None, serial: str | None = None,
                 record: Callable[[str, str], None] | None = None,
                 on_result: Callable[[ComplianceResult], None] | None = None):
        self.station = choice
        self._out_dir = out_dir
        self.base_dir = base_dir
        self.serial = serial
        self._record = record
        self._on_result = on_result
        self.results: list[ComplianceResult] = []

    @property
    def out_dir(self) -> Path:
        """Folder of this test's records (created on first use)."""
        if callable(self._out_dir):
            self._out_dir = Path(self._out_dir())
        p = Path(self._out_dir)
        p.mkdir(parents=True, exist_ok=True)
        return p

    # -- inputs -----------------------------------------------------------------------
    def profile(self, profile):
        """Load a profile (a path, or a loaded Profile). A bad file fails the test with
        the file, the key and the problem."""
        from harness.profile import Profile, load_profile

        if isinstance(profile, Profile):
            return profile
        path = _resolve(profile, self.base_dir)
        with clear_errors("harness: bad profile"):
            if not path.exists():
                raise ConfigError(str(path), None, "file not found" + (
                    f" (looked beside the test in {self.base_dir} and in the current folder)"
                    if self.base_dir and not Path(profile).is_absolute() else ""))
            return load_profile(path)

    def board(self, source=None, **kwargs):
        """A simulated board (see `make_board`); bad input fails the test clearly."""
        kwargs.setdefault("base_dir", self.base_dir)
        with clear_errors("harness: cannot build the simulated board"):
            return make_board(source, **kwargs)

    # -- measuring --------------------------------------------------------------------
    def measure(self, profile, board=None, *, serial: str | None = None, seed: int | None = None,
                unit: dict | None = None) -> ComplianceResult:
        """Measure one unit against `profile` and write its certificate.

        Parameters
        ----------
        profile : str, Path or harness.profile.Profile
        board : DeviceModel or anything `make_board` takes, optional
            The simulated unit. On the built-in simulated station it is required; on a
            simulated station file it replaces the file's device model; on real
            hardware it is ignored (the unit on the bench is measured).
        serial : str, optional
            Serial number for the certificate (default: ``--harness-serial``, else the
            board's id).
        seed : int, optional
            Seed of the simulated board's noise.
        unit : dict, optional
            Extra unit facts for the certificate (``model``, ``firmware``).

        Returns
        -------
        ComplianceResult
            Whatever the verdict; call ``.assert_compliant()`` (or `assert_compliant`)
            to fail the test unless it passed.
        """
        from harness.device import DeviceModel

        prof = self.profile(profile)
        model = None
        notes: list[str] = []
        choice = self.station
        if board is not None and not isinstance(board, DeviceModel):
            model = self.board(board)
        else:
            model = board
        if choice.hardware:
            if model is not None:
                notes.append(f"simulated board {model.id} not used: measured the unit on {choice.station.id}")
            model = None
        elif model is None and not choice.given:
            pytest.fail("harness: nothing to measure: on the built-in simulated station pass a board, e.g. "
                        "compliance.measure(profile, board=simulated_board('coeffs.json')), or run pytest with "
                        "--harness-station FILE", pytrace=False)
        with clear_errors(f"harness: cannot measure against profile {prof.id}"):
            station = choice.for_profile(prof, model)
            cal = cal_info = None
            if choice.given:
                from harness.calibration import load_calibration

                cal, cal_info = load_calibration(station)
            from harness.measure import make_backend, measure_unit

            backend = make_backend(station, device=model, seed=seed)
            try:
                ident = {}
                try:
                    ident = backend.identity() or {}
                except Exception:  # identity is informative only
                    ident = {}
                if model is not None:
                    ident = {"model": model.model or "simulated board", "firmware": model.firmware}
                sn = serial or self.serial or (model.id if model is not None else None) or f"{station.id}-unit"
                unit_doc = {"model": ident.get("model"), "firmware": ident.get("firmware")}
                unit_doc.update(unit or {})
                res = measure_unit(prof, station, sn, backend=backend, out_dir=self.out_dir, unit=unit_doc,
                                   calibration=cal, calibration_info=cal_info,
                                   plan=stimulus_plan(prof, station.sample_rate_hz))
            finally:
                try:
                    backend.close()
                except Exception:
                    pass
        plot = None
        if res.verdict != "pass" and res.json_path is not None:
            plot = self._write_plot(lambda: _measurement_png(prof, res), res.json_path)
        where = (f"{station.id} ({station.backend}, {station.sample_rate_hz:g} Hz"
                 + (", built-in" if not choice.given else f", {choice.path}") + ")")
        if model is not None:
            where += f"; simulated board {model.id}" + (f" from {model.source}" if model.source else "")
        result = ComplianceResult.from_certificate(res.certificate, json_path=res.json_path, html_path=res.html_path,
                                                   plot_path=plot, raw_path=res.raw_path, station=where,
                                                   notes=notes, details=res)
        return self._finish(result)

    def check_design(self, profile, design, *, quantize: str | None = None, points: int = 4000) -> ComplianceResult:
        """Check a filter design against `profile` without hardware: its exact response,
        evaluated on a certified dense grid (harness.design.evaluate_design).

        Parameters
        ----------
        profile : str, Path or Profile
        design : coefficient file, device model file, filter dict, FilterDesign or DeviceModel
        quantize : str, optional
            ``"Qm.n"``: judge the design with its coefficients rounded to this
            fixed-point format (what the firmware runs); the float design is not judged.
        points : int
            Base grid size (see evaluate_design).

        Returns
        -------
        ComplianceResult
            ``kind='design'``; its margins are exact (no measurement uncertainty).
        """
        from harness.design import FilterDesign, check_compatible, evaluate_design, load_coefficients, quantize_design

        prof = self.profile(profile)
        fs = prof.sample_rate_hz if prof.digital else None
        with clear_errors(f"harness: cannot check the design against profile {prof.id}"):
            if isinstance(design, (str, Path)) and _resolve(design, self.base_dir).suffix.lower() in _COEFF_EXTS:
                d = load_coefficients(_resolve(design, self.base_dir), default_sample_rate_hz=fs)
            elif isinstance(design, FilterDesign):
                d = design
            else:
                board = make_board(design, base_dir=self.base_dir)
                d = design_from_board(board, fs)
            check_compatible(d, prof.mask, profile_id=prof.id, profile_path=prof.path)
            notes = list(d.notes) + list(d.warnings)
            qrep = None
            name = d.id or (Path(d.source).stem if d.source else "design")
            if quantize is not None:
                d, qrep = quantize_design(d, quantize, key="quantize")
                name = f"{name}-{qrep.qformat.spec}"
                notes.append(f"judged with coefficients rounded to {qrep.qformat.spec} ({qrep.qformat.word_bits}-bit): "
                             f"largest coefficient error {qrep.max_abs_error:.3g}, largest pole shift "
                             f"{qrep.max_pole_shift:.3g}" + ("" if qrep.stable else "; NOT STABLE"))
            res = evaluate_design(d, prof.mask, points=points)
        result = _design_result(prof, d, res, name, qrep, notes)
        doc = json.dumps(result.certificate, indent=1, sort_keys=True, allow_nan=False, default=str).encode("utf-8")
        from harness.certificate import safe_name, write_unique

        result.certificate_path = write_unique(self.out_dir, safe_name(f"{name}-design-check"), ".json", doc)
        if not result.passed:
            result.plot_path = self._write_plot(lambda: _design_png(prof, res, name, result.verdict),
                                                result.certificate_path)
        return self._finish(result)

    # -- bookkeeping ------------------------------------------------------------------
    def _write_plot(self, make_png: Callable[[], bytes], beside: Path) -> Path | None:
        from harness.certificate import write_unique

        try:
            png = make_png()
        except Exception:  # the plot is a convenience: never lose a verdict over it
            return None
        if not png:
            return None
        return write_unique(beside.parent, beside.stem, ".png", png)

    def _finish(self, result: ComplianceResult) -> ComplianceResult:
        self.results.append(result)
        if self._record is not None:
            for name, value in result.junit_properties():
                self._record(name, value)
        if self._on_result is not None:
            self._on_result(result)
        return result


_PLANS: dict = {}
_PLAN_CACHE_SIZE = 16


def stimulus_plan(profile, sample_rate_hz: float):
    """The stimulus plan of `profile` at `sample_rate_hz` (harness.stimulus.plan_for_profile),
    kept for the rest of the session: planning a multitone (crest-factor reduction) costs
    about as much as measuring, and a test session measures one profile many times.
    The key is the profile file's path and SHA-256, so an edited profile is planned anew;
    a profile built in code (no file) is planned every time."""
    from harness.stimulus import plan_for_profile

    if not profile.path or not profile.sha256:
        return plan_for_profile(profile, sample_rate_hz)
    key = (str(profile.path), profile.sha256, float(sample_rate_hz))
    plan = _PLANS.get(key)
    if plan is None:
        plan = plan_for_profile(profile, sample_rate_hz)
        if len(_PLANS) >= _PLAN_CACHE_SIZE:
            _PLANS.pop(next(iter(_PLANS)))
        _PLANS[key] = plan
    return plan


_DATA_PNG = re.compile(r"data:image/png;base64,([A-Za-z0-9+/=]+)")


def _measurement_png(profile, res) -> bytes | None:
    """The certificate's plot as PNG bytes: taken from the HTML report when it embeds
    one (no second drawing), else drawn (harness.measure.certificate_plot)."""
    import base64

    if res.html_path is not None:
        try:
            m = _DATA_PNG.search(Path(res.html_path).read_text(encoding="utf-8"))
        except OSError:
            m = None
        if m:
            return base64.b64decode(m.group(1))
    if res.analysis is None or not getattr(res.analysis, "freq_hz", ()).size:
        return None
    from harness.measure import certificate_plot

    return certificate_plot(profile, res.analysis, res.serial)


def _design_png(profile, res, name: str, verdict: str) -> bytes:
    import io

    import numpy as np

    from harness.plot import bode_plot

    buf = io.BytesIO()
    with np.errstate(invalid="ignore"):   # infinite limits (no lower limit) in the mask drawing
        bode_plot(profile.mask, res.freq_hz, res.gain_db, phase_deg=res.phase_deg, group_delay_s=res.group_delay_s,
                  phase_freq_hz=res.phase_freq_hz, path=buf, style="curve",
                  title=f"{name}: design check against {profile.id} rev {profile.revision or '-'}: {verdict.upper()}",
                  subtitle=res.design.describe())
    return buf.getvalue()


def _design_result(profile, design, res, name: str, qrep, notes: list[str]) -> ComplianceResult:
    """A ComplianceResult (and its JSON record) from a harness.design.DesignResult."""
    import numpy as np

    mask = profile.mask
    bands = []
    for b in res.bands:
        if b.index >= 0:
            lo, hi = mask.bands[b.index].limits_at(np.array([b.worst_freq_hz]))
            lo, hi = float(lo[0]), float(hi[0])
        else:
            lo, hi = -math.inf, float(mask.transition_max_db) if mask.transition_max_db is not None else math.inf
        bands.append({"index": b.index, "kind": "transition" if b.index < 0 else b.kind, "label": b.label or "",
                      "start_hz": _f(b.start_hz), "stop_hz": _f(b.stop_hz), "points": int(b.n_points),
                      "worst_margin_db": _f(b.worst_margin_db) if b.n_points else None,
                      "worst_frequency_hz": _f(b.worst_freq_hz) if b.n_points else None,
                      "worst_gain_db": _f(b.worst_gain_db) if b.n_points else None, "U_gain_db": 0.0,
                      "limit_low_db": _f(lo), "limit_high_db": _f(hi),
                      "verdict": "not evaluated" if not b.n_points else ("pass" if b.passed else "fail")})
    judged = [b for b in bands if b["worst_margin_db"] is not None]
    worst = None
    if judged:
        wb = min(judged, key=lambda b: b["worst_margin_db"])
        worst = {"frequency_hz": wb["worst_frequency_hz"], "gain_db": wb["worst_gain_db"],
                 "margin_db": wb["worst_margin_db"], "limit_low_db": wb["limit_low_db"],
                 "limit_high_db": wb["limit_high_db"], "U_gain_db": 0.0, "band": wb["index"]}
    phase_reason = ""
    ph = res.phase
    if ph is not None and not ph.passed:
        wm = ph.worst_margin_deg
        phase_reason = f"phase rule ({mask.phase.describe()}) not met" + (
            f": worst margin {wm:+.3f} deg" if math.isfinite(wm) else "")
        if ph.group_delay_margin_s is not None and ph.group_delay_margin_s.size:
            gm = float(np.min(ph.group_delay_margin_s))
            if gm < 0:
                phase_reason += f"; group delay over its limit by {-gm * 1e3:.4g} ms"
    verdict = "pass" if res.passed else "fail"
    if not res.certified:
        notes = notes + [f"certification budget reached: a margin up to {res.cert_gap_db:.3g} dB worse than "
                         "reported may hide between evaluated frequencies"]
    rule_text = ("design check: exact response of the coefficients, worst margins proved on a dense grid "
                 f"(to {res.tol_db:g} dB); no measurement, no uncertainty")
    cert = {
        "schema": 1, "kind": "design-check", "verdict": verdict, "reasons": list(res.reasons),
        "profile": {"id": profile.id, "revision": profile.revision, "title": profile.title,
                    "sha256": profile.sha256, "file": profile.path},
        "design": {"name": name, "id": design.id, "title": design.title, "format": design.format,
                   "domain": design.domain, "sample_rate_hz": design.sample_rate_hz, "source": design.source,
                   "description": design.describe(), "stable": design.stable},
        "quantization": None if qrep is None else {
            "format": qrep.qformat.spec, "word_bits": qrep.qformat.word_bits,
            "max_abs_error": qrep.max_abs_error, "max_pole_shift": qrep.max_pole_shift, "stable": qrep.stable,
            "sos": [[float(c) for c in row] for row in qrep.sos_q]},
        "decision": {"rule": "exact", "text": rule_text},
        "bands": bands, "worst": worst, "certified": bool(res.certified), "cert_gap_db": _f(res.cert_gap_db),
        "points_evaluated": int(res.freq_hz.size), "phase_reason": phase_reason, "notes": notes,
    }
    return ComplianceResult(kind="design", verdict=verdict,
                            profile={"id": profile.id, "revision": profile.revision, "title": profile.title},
                            unit=name, station="no hardware: exact response of the coefficients",
                            reasons=list(res.reasons), bands=bands, worst=worst, rule="exact", rule_text=rule_text,
                            confidence=None, phase_reason=phase_reason, certificate=cert, notes=notes, details=res)
