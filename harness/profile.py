"""Product profiles (TOML): tolerance mask, stimulus plan settings and decision rule.

`load_profile(path)` reads and validates a profile file and returns a `Profile`. Every
problem raises `harness.errors.ConfigError` naming the file, the key path (for example
``band[2].stop_hz``) and what is wrong. The file format is the DESIGN.md contract; the
keys it adds are documented in README.md ("Writing a profile").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from harness.config import Table, load_toml, sha256_hex
from harness.mask import BAND_KINDS, PHASE_RULES, Band, LimitLine, Mask, PhaseRule
from harness.units import (
    db_from_gain,
    hz_from_nyquist,
    hz_from_rad,
    passband_db_from_ripple,
    stopband_db_from_ripple,
)

SCHEMA = 1
DECISION_RULES = ("simple", "guarded", "probability")
STIMULUS_METHODS = ("multitone", "stepped-sine")
SPACINGS = ("log", "linear")
DOMAINS = ("digital", "analog")

_TOP_KEYS = ("schema", "profile", "band", "phase", "stimulus", "decision", "control",
             "line")   # [line]: the product's retest policy, read and validated by harness.line
_PROFILE_KEYS = ("id", "title", "revision", "sample_rate_hz", "reference_hz", "domain",
                 "transition_max_db", "description")
_BAND_KEYS = ("kind", "label", "start_hz", "start_rad", "start_nyquist", "stop_hz", "stop_rad",
              "stop_nyquist", "min_db", "max_db", "min_gain", "max_gain", "delta_1", "delta_2",
              "delta_s", "upper", "lower")
_PHASE_KEYS = ("rule", "max_deviation_deg", "max_group_delay_s", "upper", "lower")
_STIMULUS_KEYS = ("method", "points_per_decade", "points", "spacing", "frequencies_hz",
                  "start_hz", "stop_hz", "level_dbfs", "periods", "transient_periods",
                  "period_samples", "unexcited_lines", "settle_s", "cycles", "min_tone_s")
_DECISION_KEYS = ("rule", "confidence", "min_probability")
_CONTROL_KEYS = ("mode", "gain_db", "commands")


@dataclass(frozen=True)
class StimulusConfig:
    """Stimulus settings from a profile's ``[stimulus]`` table (see `harness.stimulus`).

    Frequencies: an explicit ``frequencies_hz`` list, or a grid from ``start_hz`` to
    ``stop_hz`` (default: the mask's range) with ``points_per_decade`` (log spacing)
    or ``points`` (linear spacing).
    """

    method: str = "multitone"
    points_per_decade: int | None = 12
    points: int | None = None
    spacing: str = "log"
    frequencies_hz: tuple[float, ...] | None = None
    start_hz: float | None = None
    stop_hz: float | None = None
    level_dbfs: float = -12.0
    periods: int = 8                 # measured periods (multitone) / repeats (stepped sine)
    transient_periods: int = 2       # multitone periods played and discarded first
    period_samples: int | None = None
    unexcited_lines: bool = True     # leave lines between tones empty to see distortion
    settle_s: float | None = None    # stepped sine: settling time before capture
    cycles: int = 16                 # stepped sine: minimum whole cycles captured
    min_tone_s: float = 0.01         # stepped sine: minimum capture time per frequency


@dataclass(frozen=True)
class DecisionConfig:
    """Decision rule: ``simple`` (ILAC-G8 w = 0), ``guarded`` (ILAC-G8 w = U) or
    ``probability`` (JCGM 106 probability of conformance >= ``min_probability``)."""

    rule: str = "guarded"
    confidence: float = 0.95
    min_probability: float = 0.95


@dataclass(frozen=True)
class ControlConfig:
    """Board settings a profile requires before measuring (serial board control), and
    optionally the product's own board command map (``commands``: a table, or a file
    relative to the profile), which then takes the place of the station's."""

    mode: str | None = None
    gain_db: float | None = None
    commands: object | None = None      # harness.control.BoardCommands


@dataclass(frozen=True)
class Profile:
    id: str
    title: str
    revision: str
    mask: Mask
    stimulus: StimulusConfig = field(default_factory=StimulusConfig)
    decision: DecisionConfig = field(default_factory=DecisionConfig)
    control: ControlConfig = field(default_factory=ControlConfig)
    domain: str = "analog"
    sample_rate_hz: float | None = None
    path: str | None = None
    sha256: str | None = None
    description: str = ""

    @property
    def digital(self) -> bool:
        return self.domain == "digital"


# --------------------------------------------------------------------------------------
def load_profile(path: str | Path) -> Profile:
    """Load and validate a profile file. Raises ConfigError on any problem."""
    data, raw = load_toml(path)
    return parse_profile(data, file=str(path), sha256=sha256_hex(raw))


def parse_profile(data: dict, *, file: str | None = None, sha256: str | None = None) -> Profile:
    """Validate an already-parsed profile mapping (see `load_profile`)."""
    top = Table(data, file)
    top.check_known(_TOP_KEYS)
    schema = top.int("schema")
    if schema != SCHEMA:
        raise top.error("schema", f"unsupported schema {schema}; this harness reads schema {SCHEMA}")

    prof = top.table("profile")
    prof.check_known(_PROFILE_KEYS)
    pid = prof.str("id")
    if not pid.strip():
        raise prof.error("id", "must not be empty")
    title = prof.str("title", pid)
    revision = prof.str("revision", "")
    description = prof.str("description", "")
    fs = prof.float("sample_rate_hz", None, min=0.0, min_exclusive=True)
    domain = prof.str("domain", "digital" if fs is not None else "analog", choices=DOMAINS)
    if domain == "digital" and fs is None:
        raise prof.error("domain", "a digital profile needs [profile].sample_rate_hz")
    ref_hz = prof.float("reference_hz", None, min=0.0, min_exclusive=True)
    transition_max_db = prof.float("transition_max_db", None)
    nyquist = fs / 2.0 if fs is not None else None
    if ref_hz is not None and domain == "digital" and ref_hz > nyquist * (1 + 1e-12):
        raise prof.error("reference_hz", f"{ref_hz:g} Hz lies beyond Nyquist ({nyquist:g} Hz)")

    band_tables = top.tables("band")
    if not band_tables:
        raise top.error("band", "a profile needs at least one [[band]]")
    bands = tuple(_parse_band(t, fs, domain) for t in band_tables)
    _check_overlaps(bands, band_tables)

    phase = _parse_phase(top.table("phase", None), bands, file)
    stimulus = _parse_stimulus(top.table("stimulus", None), fs, domain)
    decision = _parse_decision(top.table("decision", None))
    control = _parse_control(top.table("control", None), file)

    if ref_hz is not None and not any(b.covers(ref_hz) for b in bands if b.kind in ("pass", "limits")):
        raise prof.error("reference_hz", f"{ref_hz:g} Hz lies in no pass or limits band; "
                                          "the reference should be a frequency where the gain is specified")

    mask = Mask(bands=bands, reference_hz=ref_hz, sample_rate_hz=fs,
                transition_max_db=transition_max_db, phase=phase)
    return Profile(id=pid, title=title, revision=revision, mask=mask, stimulus=stimulus,
                   decision=decision, control=control, domain=domain, sample_rate_hz=fs,
                   path=file, sha256=sha256, description=description)


# --------------------------------------------------------------------------------------
def _edge(t: Table, which: str, fs: float | None, domain: str, required: bool) -> float | None:
    names = [f"{which}_hz", f"{which}_rad", f"{which}_nyquist"]
    given = [n for n in names if t.has(n)]
    if len(given) > 1:
        raise t.error(given[1], f"give only one of {', '.join(names)} (also got {given[0]})")
    if not given:
        if required:
            raise t.error(f"{which}_hz", f"missing key (give one of {', '.join(names)})")
        return None
    name = given[0]
    value = t.float(name)
    if value < 0:
        raise t.error(name, f"negative frequency {value:g}")
    if name.endswith("_hz"):
        hz = value
    else:
        if fs is None:
            raise t.error(name, "a rad/sample or fraction-of-Nyquist edge needs [profile].sample_rate_hz")
        hz = float(hz_from_rad(value, fs) if name.endswith("_rad") else hz_from_nyquist(value, fs))
    if domain == "digital":
        nyq = fs / 2.0
        if hz > nyq * (1 + 1e-12):
            shown = f"{value:g} rad/sample = " if name.endswith("_rad") else ""
            raise t.error(name, f"{shown}{hz:g} Hz lies beyond Nyquist ({nyq:g} Hz, pi rad/sample) "
                                "of this digital profile")
        hz = min(hz, nyq)  # an edge exactly at pi may round a hair above fs/2
    return hz


def _gain_pair(t: Table, kind: str) -> tuple[float | None, float | None]:
    forms = {
        "db": [n for n in ("min_db", "max_db") if t.has(n)],
        "gain": [n for n in ("min_gain", "max_gain") if t.has(n)],
        "ripple": [n for n in ("delta_1", "delta_2", "delta_s") if t.has(n)],
    }
    used = [k for k, v in forms.items() if v]
    if len(used) > 1:
        a, b = forms[used[0]][0], forms[used[1]][0]
        raise t.error(b, f"mixes gain forms ({a} and {b}); use dB, linear gain or ripple form, not several")
    if kind == "pass":
        if forms["ripple"]:
            if t.has("delta_s"):
                raise t.error("delta_s", "delta_s is the stop-band ripple; a pass band takes delta_1 and delta_2")
            d1 = t.float("delta_1", min=0.0)
            d2 = t.float("delta_2", min=0.0)
            if d2 >= 1.0:
                raise t.error("delta_2", f"must be below 1 (1 - delta_2 is the lowest allowed gain), got {d2:g}")
            return passband_db_from_ripple(d1, d2)
        if forms["gain"]:
            lo = t.float("min_gain", min=0.0, min_exclusive=True)
            hi = t.float("max_gain", min=0.0, min_exclusive=True)
            lo_db, hi_db = float(db_from_gain(lo)), float(db_from_gain(hi))
            if lo > hi:
                raise t.error("min_gain", f"min_gain {lo:g} is above max_gain {hi:g}")
            return lo_db, hi_db
        if not forms["db"]:
            raise t.error("min_db", "missing key (a pass band needs min_db and max_db, "
                                    "min_gain and max_gain, or delta_1 and delta_2)")
        lo = t.float("min_db")
        hi = t.float("max_db")
        if lo > hi:
            raise t.error("min_db", f"min_db {lo:g} is above max_db {hi:g}")
        return lo, hi
    # stop band: a ceiling only
    for n in ("min_db", "min_gain", "delta_1", "delta_2"):
        if t.has(n):
            raise t.error(n, "a stop band has a ceiling only (max_db, max_gain or delta_s)")
    if t.has("delta_s"):
        return None, stopband_db_from_ripple(t.float("delta_s", min=0.0, min_exclusive=True))
    if t.has("max_gain"):
        return None, float(db_from_gain(t.float("max_gain", min=0.0, min_exclusive=True)))
    if not t.has("max_db"):
        raise t.error("max_db", "missing key (a stop band needs max_db, max_gain or delta_s)")
    return None, t.float("max_db")


def _line(t: Table, name: str) -> LimitLine | None:
    pts = t.pairs(name, None)
    if pts is None:
        return None
    for i, (hz, _) in enumerate(pts):
        if hz <= 0:
            raise t.error(f"{name}[{i}][0]", f"frequency must be > 0 Hz (lines are drawn over "
                                              f"log-frequency), got {hz:g}")
        if i and hz < pts[i - 1][0]:
            raise t.error(f"{name}[{i}][0]", f"frequencies must ascend; {hz:g} Hz follows {pts[i - 1][0]:g} Hz")
    return LimitLine(tuple(p[0] for p in pts), tuple(p[1] for p in pts))


def _parse_band(t: Table, fs: float | None, domain: str) -> Band:
    t.check_known(_BAND_KEYS)
    kind = t.str("kind", choices=BAND_KINDS)
    label = t.str("label", "")
    if kind == "limits":
        for n in ("min_db", "max_db", "min_gain", "max_gain", "delta_1", "delta_2", "delta_s"):
            if t.has(n):
                raise t.error(n, "a limits band takes upper and lower lines ([[hz, db], ...]), not " + n)
        upper, lower = _line(t, "upper"), _line(t, "lower")
        if upper is None and lower is None:
            raise t.error("upper", "missing key (a limits band needs upper and/or lower)")
        lines = [ln for ln in (upper, lower) if ln is not None]
        start = _edge(t, "start", fs, domain, required=False)
        stop = _edge(t, "stop", fs, domain, required=False)
        start = min(ln.start_hz for ln in lines) if start is None else start
        stop = max(ln.stop_hz for ln in lines) if stop is None else stop
        if domain == "digital" and stop > fs / 2 * (1 + 1e-12):
            raise t.error("upper" if upper is not None else "lower",
                          f"line reaches {stop:g} Hz, beyond Nyquist ({fs / 2:g} Hz) of this digital profile")
        if upper is not None and lower is not None:
            f = np.unique(np.concatenate([upper.freq_hz, lower.freq_hz]))
            hi, lo = upper.at(f), lower.at(f)
            both = np.isfinite(hi) & np.isfinite(lo)
            bad = np.flatnonzero(both & (lo > hi))
            if bad.size:
                j = bad[0]
                raise t.error("lower", f"lower line {lo[j]:g} dB is above upper line {hi[j]:g} dB at {f[j]:g} Hz")
        if not start < stop:
            raise t.error("stop_hz", f"start ({start:g} Hz) must be below stop ({stop:g} Hz)")
        return Band(kind, start, stop, upper=upper, lower=lower, label=label)
    for n in ("upper", "lower"):
        if t.has(n):
            raise t.error(n, f"only a limits band takes {n} lines; a {kind} band takes min/max values")
    start = _edge(t, "start", fs, domain, required=True)
    stop = _edge(t, "stop", fs, domain, required=True)
    if not start < stop:
        key = next(n for n in ("start_hz", "start_rad", "start_nyquist") if t.has(n))
        raise t.error(key, f"start ({start:g} Hz) must be below stop ({stop:g} Hz)")
    lo, hi = _gain_pair(t, kind)
    return Band(kind, start, stop, min_db=lo, max_db=hi, label=label)


def _check_overlaps(bands: tuple[Band, ...], tables: list[Table]) -> None:
    for i, a in enumerate(bands):
        for j, b in enumerate(bands):
            if j <= i or {a.kind, b.kind} != {"pass", "stop"}:
                continue
            if a.start_hz <= b.stop_hz and b.start_hz <= a.stop_hz:
                raise tables[j].error(None, f"{b.kind} band {b.start_hz:g}..{b.stop_hz:g} Hz overlaps "
                                            f"{a.kind} band[{i}] {a.start_hz:g}..{a.stop_hz:g} Hz "
                                            "(leave a transition band between them)")


def _parse_phase(t: Table | None, bands, file) -> PhaseRule:
    if t is None:
        return PhaseRule()
    t.check_known(_PHASE_KEYS)
    rule = t.str("rule", "none", choices=PHASE_RULES)
    dev = gd = None
    upper = lower = None
    if rule in ("linear", "zero"):
        dev = t.float("max_deviation_deg", min=0.0, min_exclusive=True)
        if not any(b.kind == "pass" for b in bands):
            raise t.error("rule", f"phase rule '{rule}' applies over the pass bands, and the profile has none")
    elif t.has("max_deviation_deg"):
        raise t.error("max_deviation_deg", f"only the linear and zero rules take a deviation (rule is '{rule}')")
    if rule == "limits":
        upper, lower = _line(t, "upper"), _line(t, "lower")
        if upper is None and lower is None:
            raise t.error("upper", "missing key (phase rule 'limits' needs upper and/or lower [[hz, deg], ...])")
    else:
        for n in ("upper", "lower"):
            if t.has(n):
                raise t.error(n, f"phase lines need rule = \"limits\" (rule is '{rule}')")
    if t.has("max_group_delay_s"):
        gd = t.float("max_group_delay_s", min=0.0, min_exclusive=True)
        if not any(b.kind == "pass" for b in bands):
            raise t.error("max_group_delay_s", "a group-delay limit applies over the pass bands, and the profile has none")
    return PhaseRule(rule, dev, gd, upper, lower)


def _parse_stimulus(t: Table | None, fs: float | None, domain: str) -> StimulusConfig:
    if t is None:
        return StimulusConfig()
    t.check_known(_STIMULUS_KEYS)
    method = t.str("method", "multitone", choices=STIMULUS_METHODS)
    spacing = t.str("spacing", "log", choices=SPACINGS)
    freqs = t.float_list("frequencies_hz", None, min=0.0, min_exclusive=True)
    if freqs is not None:
        for n in ("points_per_decade", "points", "start_hz", "stop_hz"):
            if t.has(n):
                raise t.error(n, "give either frequencies_hz or a grid (start_hz, stop_hz, points...), not both")
        if sorted(set(freqs)) != freqs:
            raise t.error("frequencies_hz", "must ascend with no repeats")
        if domain == "digital" and max(freqs) > fs / 2 * (1 + 1e-12):
            raise t.error("frequencies_hz", f"{max(freqs):g} Hz lies beyond Nyquist ({fs / 2:g} Hz)")
        freqs = tuple(freqs)
    ppd = t.int("points_per_decade", None, min=1, max=1000)
    pts = t.int("points", None, min=2, max=100000)
    if spacing == "log" and pts is not None:
        raise t.error("points", "points sets a linear grid; use points_per_decade with spacing = \"log\"")
    if spacing == "linear" and ppd is not None:
        raise t.error("points_per_decade", "points_per_decade sets a log grid; use points with spacing = \"linear\"")
    if freqs is None and spacing == "log" and ppd is None:
        ppd = 12
    if freqs is None and spacing == "linear" and pts is None:
        raise t.error("points", "missing key (a linear grid needs points)")
    start = t.float("start_hz", None, min=0.0, min_exclusive=True)
    stop = t.float("stop_hz", None, min=0.0, min_exclusive=True)
    if start is not None and stop is not None and not start < stop:
        raise t.error("start_hz", f"start_hz {start:g} must be below stop_hz {stop:g}")
    level = t.float("level_dbfs", -12.0, max=0.0)
    if level < -120:
        raise t.error("level_dbfs", f"{level:g} dBFS is too low to measure anything (at least -120)")
    periods = t.int("periods", 8, min=2, max=10000)
    transient = t.int("transient_periods", 2, min=0, max=1000)
    period_samples = t.int("period_samples", None, min=64, max=1 << 24)
    unexcited = t.bool("unexcited_lines", True)
    settle = t.float("settle_s", None, min=0.0)
    cycles = t.int("cycles", 16, min=3, max=1_000_000)
    min_tone = t.float("min_tone_s", 0.01, min=0.0, min_exclusive=True)
    return StimulusConfig(method=method, points_per_decade=ppd, points=pts, spacing=spacing,
                          frequencies_hz=freqs, start_hz=start, stop_hz=stop, level_dbfs=level,
                          periods=periods, transient_periods=transient, period_samples=period_samples,
                          unexcited_lines=unexcited, settle_s=settle, cycles=cycles, min_tone_s=min_tone)


def _parse_decision(t: Table | None) -> DecisionConfig:
    if t is None:
        return DecisionConfig()
    t.check_known(_DECISION_KEYS)
    rule = t.str("rule", "guarded", choices=DECISION_RULES)
    conf = t.float("confidence", 0.95)
    if not 0.5 < conf < 1.0:
        raise t.error("confidence", f"must lie between 0.5 and 1 (exclusive), got {conf:g}")
    pmin = t.float("min_probability", conf)
    if not 0.5 < pmin < 1.0:
        raise t.error("min_probability", f"must lie between 0.5 and 1 (exclusive), got {pmin:g}")
    if rule != "probability" and t.has("min_probability"):
        raise t.error("min_probability", f"only the probability rule uses min_probability (rule is '{rule}')")
    return DecisionConfig(rule, conf, pmin)


def _parse_control(t: Table | None, file: str | None) -> ControlConfig:
    if t is None:
        return ControlConfig()
    t.check_known(_CONTROL_KEYS)
    commands = None
    if t.has("commands"):
        from harness import control  # the board command-map format lives with board control

        commands = t.file_or_table(
            "commands", None if file is None else Path(file).resolve().parent, load=control.load_commands,
            what="board command-map", parse=lambda raw, key: control.parse_commands(raw, file=file, path=key))
    return ControlConfig(mode=t.str("mode", None), gain_db=t.float("gain_db", None), commands=commands)


# --------------------------------------------------------------------------------------
def describe_profile(p: Profile) -> str:
    """Human-readable summary: bands in Hz and rad/sample, phase and decision rules."""
    fs = p.sample_rate_hz
    lines = [f"profile {p.id}  rev {p.revision or '-'}  ({p.title})",
             f"  domain: {p.domain}" + (f", sample rate {fs:g} Hz (Nyquist {fs / 2:g} Hz = pi rad/sample)" if fs else ""),
             ]
    if p.mask.reference_hz:
        lines.append(f"  gains relative to the gain at {p.mask.reference_hz:g} Hz")
    else:
        lines.append("  gains absolute")
    lines.append("  bands:")
    hdr = f"    {'#':>2}  {'kind':<7} {'start Hz':>11} {'stop Hz':>11}"
    if fs:
        hdr += f" {'start rad/sample':>16} {'stop rad/sample':>16}"
    hdr += "  limits"
    lines.append(hdr)
    for i, b in enumerate(p.mask.bands):
        row = f"    {i:>2}  {b.kind:<7} {b.start_hz:>11.6g} {b.stop_hz:>11.6g}"
        if fs:
            row += f" {2 * math.pi * b.start_hz / fs:>16.6f} {2 * math.pi * b.stop_hz / fs:>16.6f}"
        row += "  " + b.describe() + (f"  [{b.label}]" if b.label else "")
        lines.append(row)
    if p.mask.transition_max_db is not None:
        lines.append(f"  transition bands: ceiling {p.mask.transition_max_db:+.2f} dB")
    else:
        lines.append("  transition bands: free")
    lines.append(f"  phase rule: {p.mask.phase.describe()}")
    d = p.decision
    rule = {"simple": "simple acceptance (ILAC-G8, w = 0)",
            "guarded": "guarded acceptance (ILAC-G8, w = U)",
            "probability": f"probability of conformance >= {d.min_probability:g} (JCGM 106)"}[d.rule]
    lines.append(f"  decision rule: {rule}, confidence {d.confidence:g}")
    s = p.stimulus
    grid = (f"{len(s.frequencies_hz)} listed frequencies" if s.frequencies_hz else
            f"{s.points_per_decade} points/decade" if s.spacing == "log" else f"{s.points} linear points")
    lines.append(f"  stimulus: {s.method}, {grid}, {s.level_dbfs:g} dBFS")
    if p.control.mode:
        lines.append(f"  board mode required: {p.control.mode}")
    return "\n".join(lines)
