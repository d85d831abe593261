"""Simulated device models (TOML): the filter a board implements and its imperfections.

`load_device_model(path)` reads and validates a device model file (DESIGN.md "Contract:
simulated device model") and returns a `DeviceModel`; `generate_lot` makes a production
lot of perturbed copies with serial numbers. `harness.backends.simulated.SimulatedBoard`
turns a `DeviceModel` into a board that plays and captures.

File format
-----------
::

    [device]
    id = "KA200-NOMINAL"          # required; a lot writes the serial number here
    model = "KA-200"              # optional: product/model name
    firmware = "1.4.2"            # optional
    manufacturer = "..."          # optional
    description = "..."           # optional free text
    note = "..."                  # optional free text (generate_lot records the spread here)

    [device.filter]               # exactly one of design, sos, zpk, ba
    design = { family = "butter", order = 6, cutoff_hz = 18000, btype = "lowpass",
               domain = "analog" }

    [device.imperfections]        # all optional; the defaults are an ideal board
    gain_error_db = 0.0

Filter forms (all frequencies in Hz unless said otherwise):

``design = {...}``
    ``family``: butter | cheby1 | cheby2 | ellip | bessel | linkwitz_riley | iirnotch |
    iirpeak. ``order`` (1..20; the band forms double it as scipy.signal does;
    linkwitz_riley: even, the square of a Butterworth of half the order). ``cutoff_hz``:
    a number, or ``[low, high]`` for ``btype`` bandpass | bandstop (``btype`` defaults to
    lowpass). ``domain``: analog | digital (required; iirnotch and iirpeak are digital
    only and default to it). ``rp_db`` pass-band ripple (cheby1, ellip), ``rs_db``
    stop-band attenuation (cheby2, ellip), ``q`` quality factor (iirnotch, iirpeak),
    ``norm`` (bessel: phase | delay | mag, scipy's default phase). A digital design may
    give ``sample_rate_hz``, the rate it was made for (default: the station rate).
``sos = [[b0, b1, b2, 1, a1, a2], ...]``
    Digital second-order sections; needs ``sample_rate_hz`` beside it in
    ``[device.filter]``. Rows with a0 != 1 are normalised.
``zpk = { z = [...], p = [...], k = ..., domain = "analog" | "digital" }``
    Zeros and poles as numbers or ``[re, im]`` pairs (complex ones in conjugate pairs).
    Analog: s-plane in rad/s (scipy.signal convention), at most as many zeros as poles,
    poles in the left half-plane. Digital: z-plane, poles inside the unit circle, and
    ``sample_rate_hz`` inside the table.
``ba = { b = [...], a = [...], domain = ..., sample_rate_hz = ... }``
    Transfer-function coefficients, highest power first (analog: powers of s in rad/s;
    digital: powers of z^-1, as scipy.signal.lfilter). Same rules as zpk.

Imperfections (`Imperfections` documents units): gain_error_db, input_noise_dbfs,
output_noise_dbfs, latency_samples, dc_offset, clock_offset_ppm, hum_hz, hum_dbfs,
clip_level, third_order_distortion, dropout_at_s, dropout_samples, fault, seed.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import signal

from harness.config import Table, load_toml
from harness.errors import ConfigError

FAMILIES = ("butter", "cheby1", "cheby2", "ellip", "bessel", "linkwitz_riley", "iirnotch", "iirpeak")
BTYPES = ("lowpass", "highpass", "bandpass", "bandstop")
DOMAINS = ("analog", "digital")
FAULTS = ("none", "open", "short", "dead")
BESSEL_NORMS = ("phase", "delay", "mag")
MAX_ORDER = 20

_TOP_KEYS = ("device",)
_DEVICE_KEYS = ("id", "model", "firmware", "manufacturer", "description", "note", "filter",
                "imperfections")
_FILTER_KEYS = ("design", "sos", "zpk", "ba", "sample_rate_hz")
_FORMS = ("design", "sos", "zpk", "ba")
_DESIGN_KEYS = ("family", "order", "cutoff_hz", "btype", "domain", "rp_db", "rs_db", "q", "norm",
                "sample_rate_hz")
_ZPK_KEYS = ("z", "p", "k", "domain", "sample_rate_hz")
_BA_KEYS = ("b", "a", "domain", "sample_rate_hz")
_IMPERFECTION_KEYS = ("gain_error_db", "input_noise_dbfs", "output_noise_dbfs", "latency_samples",
                      "dc_offset", "clock_offset_ppm", "hum_hz", "hum_dbfs", "clip_level",
                      "third_order_distortion", "dropout_at_s", "dropout_samples", "fault", "seed")


# --------------------------------------------------------------------------------------
# data model
@dataclass(frozen=True)
class DesignSpec:
    """A filter described by a scipy.signal design call (see the module docstring).

    ``cutoff_hz`` is a float, or a ``(low, high)`` tuple for band designs.
    """

    family: str
    cutoff_hz: float | tuple[float, float]
    order: int | None = None
    btype: str = "lowpass"
    rp_db: float | None = None
    rs_db: float | None = None
    q: float | None = None
    norm: str | None = None


@dataclass(frozen=True)
class FilterSpec:
    """The filter of a board in one of four forms.

    Attributes
    ----------
    form : {'design', 'sos', 'zpk', 'ba'}
    domain : {'analog', 'digital'}
    sample_rate_hz : float or None
        Digital only: the rate the coefficients (or the design) were made for; None for a
        digital design means "the station rate".
    design, sos, z, p, k, b, a
        The form's data (the others are None). ``z``/``p`` are tuples of complex;
        analog roots are in rad/s.
    """

    form: str
    domain: str
    sample_rate_hz: float | None = None
    design: DesignSpec | None = None
    sos: tuple[tuple[float, ...], ...] | None = None
    z: tuple[complex, ...] | None = None
    p: tuple[complex, ...] | None = None
    k: float | None = None
    b: tuple[float, ...] | None = None
    a: tuple[float, ...] | None = None

    @property
    def analog(self) -> bool:
        return self.domain == "analog"

    def key(self, name: str | None = None) -> str:
        """Key path of this filter (or one of its keys) in a device model file."""
        base = "device.filter" if self.form == "sos" else f"device.filter.{self.form}"
        if name == "sample_rate_hz" and self.form == "sos":
            return "device.filter.sample_rate_hz"
        return f"{base}.{name}" if name else base

    # -- realisations ------------------------------------------------------------------
    def analog_zpk(self) -> tuple[np.ndarray, np.ndarray, float]:
        """Zeros, poles (rad/s) and gain of an analog filter.

        Raises
        ------
        ValueError
            For a digital filter.
        """
        if not self.analog:
            raise ValueError("analog_zpk: this filter is digital")
        if self.form == "zpk":
            return np.asarray(self.z, complex), np.asarray(self.p, complex), float(self.k)
        if self.form == "ba":
            z, p, k = signal.tf2zpk(self.b, self.a)
            return np.asarray(z, complex), np.asarray(p, complex), float(k)
        d = self.design
        wn = (2.0 * np.pi * np.asarray(d.cutoff_hz, float)).tolist()
        if d.family == "linkwitz_riley":
            z, p, k = signal.butter(d.order // 2, wn, d.btype, analog=True, output="zpk")
            return np.concatenate([z, z]), np.concatenate([p, p]), float(k) ** 2
        z, p, k = _design(d, wn, analog=True, fs=None)
        return np.asarray(z, complex), np.asarray(p, complex), float(k)

    def digital_sos(self, sample_rate_hz: float, file: str | None = None) -> np.ndarray:
        """Second-order sections of a digital filter running at `sample_rate_hz`.

        A digital filter made for another rate is a configuration error: its coefficients
        would put every frequency in the wrong place.

        Raises
        ------
        ConfigError
            Rate mismatch, or a digital design edge at or beyond `sample_rate_hz` / 2.
        ValueError
            For an analog filter.
        """
        if self.analog:
            raise ValueError("digital_sos: this filter is analog")
        fs = float(sample_rate_hz)
        if self.sample_rate_hz is not None and not math.isclose(self.sample_rate_hz, fs, rel_tol=1e-9):
            raise ConfigError(file, self.key("sample_rate_hz"),
                              f"this digital filter was made for {self.sample_rate_hz:g} Hz but the "
                              f"station runs at {fs:g} Hz; redesign it for {fs:g} Hz (digital "
                              "coefficients scale every frequency with the sample rate)")
        if self.form == "sos":
            return np.array(self.sos, float)
        if self.form == "zpk":
            return signal.zpk2sos(np.asarray(self.z, complex), np.asarray(self.p, complex), self.k)
        if self.form == "ba":
            return signal.tf2sos(self.b, self.a)
        d = self.design
        edges = np.atleast_1d(np.asarray(d.cutoff_hz, float))
        if edges.max() >= fs / 2.0:
            raise ConfigError(file, self.key("cutoff_hz"),
                              f"{edges.max():g} Hz is not below half the sample rate ({fs / 2:g} Hz) "
                              "of this digital design")
        if d.family in ("iirnotch", "iirpeak"):
            fn = signal.iirnotch if d.family == "iirnotch" else signal.iirpeak
            b, a = fn(float(d.cutoff_hz), d.q, fs=fs)
            return signal.tf2sos(b, a)
        wn = edges.tolist() if edges.size == 2 else float(edges[0])
        if d.family == "linkwitz_riley":
            sos = signal.butter(d.order // 2, wn, d.btype, output="sos", fs=fs)
            return np.concatenate([sos, sos])
        return _design(d, wn, analog=False, fs=fs)

    def response(self, freq_hz, sample_rate_hz: float | None = None, file: str | None = None) -> np.ndarray:
        """Ideal complex response of the filter.

        Parameters
        ----------
        freq_hz : array_like
            Frequencies in Hz.
        sample_rate_hz : float, optional
            Needed for a digital filter (the rate it runs at).

        Returns
        -------
        ndarray of complex
            Analog: ``H(j 2 pi f)`` from scipy.signal.freqs_zpk. Digital:
            ``H(exp(j 2 pi f / fs))`` from scipy.signal.sosfreqz.
        """
        f = np.atleast_1d(np.asarray(freq_hz, float))
        if self.analog:
            z, p, k = self.analog_zpk()
            return signal.freqs_zpk(z, p, k, worN=2.0 * np.pi * f)[1]
        if sample_rate_hz is None:
            raise ValueError("response: a digital filter needs sample_rate_hz")
        sos = self.digital_sos(sample_rate_hz, file)
        return signal.sosfreqz(sos, worN=f, fs=float(sample_rate_hz))[1]

    def characteristic_hz(self) -> float | None:
        """A frequency that characterises the filter (cutoff, or the geometric centre of a
        band; for coefficient forms the geometric mean of the non-zero pole magnitudes in
        Hz). Used to prewarp the bilinear transform of analog filters."""
        if self.design is not None:
            return float(np.exp(np.mean(np.log(np.atleast_1d(self.design.cutoff_hz)))))
        if self.analog:
            _, p, _ = self.analog_zpk()
            mags = np.abs(p[np.abs(p) > 0])
            return float(np.exp(np.mean(np.log(mags))) / (2 * np.pi)) if mags.size else None
        return None


@dataclass(frozen=True)
class Imperfections:
    """What makes a simulated board less than ideal. Defaults: an ideal board.

    Attributes
    ----------
    gain_error_db : float
        Broad-band gain error of the board, dB.
    input_noise_dbfs, output_noise_dbfs : float or None
        White Gaussian noise added before / after the filter, rms level as
        ``20 log10(rms)`` re full scale 1.0 (None: no noise).
    latency_samples : float
        The board's own delay, whole and fractional samples (>= 0).
    dc_offset : float
        Added to the board output, full-scale units.
    clock_offset_ppm : float
        Capture clock vs playback clock, ``(f_capture / f_playback - 1) * 1e6``.
    hum_hz, hum_dbfs : float, float or None
        Mains hum tone added to the board output: frequency and amplitude as
        ``20 log10(peak)`` re full scale (a full-scale sine is 0 dBFS; None: no hum).
    clip_level : float or None
        The board output saturates at +-clip_level (None: the board itself never clips;
        the interface still saturates at +-1).
    third_order_distortion : float
        Coefficient k of the static nonlinearity ``y + k y**3`` on the board output.
    dropout_at_s, dropout_samples : float or None, int
        A block of `dropout_samples` samples lost from each capture at `dropout_at_s`.
    fault : {'none', 'open', 'short', 'dead'}
        open: no output; short: output stuck at the negative rail; dead: noise only.
    seed : int
        Seed of the board's random streams (a backend may override it).
    """

    gain_error_db: float = 0.0
    input_noise_dbfs: float | None = None
    output_noise_dbfs: float | None = None
    latency_samples: float = 0.0
    dc_offset: float = 0.0
    clock_offset_ppm: float = 0.0
    hum_hz: float = 50.0
    hum_dbfs: float | None = None
    clip_level: float | None = None
    third_order_distortion: float = 0.0
    dropout_at_s: float | None = None
    dropout_samples: int = 0
    fault: str = "none"
    seed: int = 1


@dataclass(frozen=True)
class DeviceModel:
    """A simulated device under test (see the module docstring for the file format).

    ``source`` is the file it was read from (for error messages); it is not written by
    `to_dict` / `to_toml`.
    """

    id: str
    filter: FilterSpec
    imperfections: Imperfections = field(default_factory=Imperfections)
    model: str | None = None
    firmware: str | None = None
    manufacturer: str | None = None
    description: str | None = None
    note: str | None = None
    source: str | None = field(default=None, compare=False)

    def response(self, freq_hz, sample_rate_hz: float | None = None) -> np.ndarray:
        """Ideal filter response (no gain error, no latency); see `FilterSpec.response`."""
        return self.filter.response(freq_hz, sample_rate_hz, self.source)

    def to_dict(self) -> dict:
        """The TOML structure of this model (``{"device": {...}}``); imperfections equal
        to their defaults are left out, complex numbers become ``[re, im]`` pairs."""
        dev: dict[str, Any] = {"id": self.id}
        for name in ("model", "firmware", "manufacturer", "description", "note"):
            if getattr(self, name) is not None:
                dev[name] = getattr(self, name)
        dev["filter"] = _filter_to_dict(self.filter)
        imp = {}
        default = Imperfections()
        for f in dataclasses.fields(Imperfections):
            value = getattr(self.imperfections, f.name)
            if value is not None and value != getattr(default, f.name):
                imp[f.name] = value
        if imp:
            dev["imperfections"] = imp
        return {"device": dev}

    def to_toml(self, header: str | None = None) -> str:
        """This model as TOML text that `load_device_model` reads back to an equal model.

        Parameters
        ----------
        header : str, optional
            Comment lines put at the top (without the ``#``).
        """
        d = self.to_dict()["device"]
        lines = [f"# {line}".rstrip() for line in header.splitlines()] if header else []
        lines.append("[device]")
        for name in ("id", "model", "firmware", "manufacturer", "description", "note"):
            if name in d:
                lines.append(f"{name} = {_toml_value(d[name])}")
        lines.append("")
        lines.append("[device.filter]")
        for name, value in d["filter"].items():
            if name == "sos":
                lines.append("sos = [")
                lines.extend(f"  {_toml_value(row)}," for row in value)
                lines.append("]")
            else:
                lines.append(f"{name} = {_toml_value(value)}")
        if "imperfections" in d:
            lines.append("")
            lines.append("[device.imperfections]")
            for name, value in d["imperfections"].items():
                lines.append(f"{name} = {_toml_value(value)}")
        return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------
# loading
def load_device_model(path: str | Path) -> DeviceModel:
    """Load and validate a device model file.

    Raises
    ------
    ConfigError
        Naming the file, the key path (for example ``device.filter.design.order``) and
        the problem; an unknown key suggests the nearest known one.
    """
    data, _ = load_toml(path)
    return parse_device_model(data, file=str(path))


def parse_device_model(data: dict, file: str | None = None) -> DeviceModel:
    """Validate an already-parsed device model mapping (see `load_device_model`)."""
    top = Table(data, file)
    top.check_known(_TOP_KEYS)
    dev = top.table("device")
    dev.check_known(_DEVICE_KEYS)
    dev_id = dev.str("id")
    if not dev_id.strip():
        raise dev.error("id", "must not be empty")
    texts = {n: dev.str(n, None) for n in ("model", "firmware", "manufacturer", "description", "note")}
    if not dev.has("filter"):
        raise dev.error("filter", "missing table [device.filter] (give exactly one of "
                                  "design, sos, zpk, ba)")
    filt = _parse_filter(dev.table("filter"))
    imp = _parse_imperfections(dev.table("imperfections", None))
    return DeviceModel(id=dev_id, filter=filt, imperfections=imp, source=file, **texts)


def _parse_filter(t: Table) -> FilterSpec:
    t.check_known(_FILTER_KEYS)
    given = [n for n in _FORMS if t.has(n)]
    if not given:
        raise t.error(None, "missing filter: give exactly one of design, sos, zpk, ba")
    if len(given) > 1:
        raise t.error(given[1], f"two filter forms ({given[0]} and {given[1]}); give exactly one")
    form = given[0]
    if t.has("sample_rate_hz") and form != "sos":
        raise t.error("sample_rate_hz", f"put sample_rate_hz inside device.filter.{form} "
                                        "(only the sos form takes it here)")
    if form == "sos":
        return _parse_sos(t)
    sub = t.table(form)
    if form == "design":
        return _parse_design(sub)
    return _parse_coefficients(sub, form)


def _parse_rate(t: Table, domain: str, required: bool) -> float | None:
    if domain == "analog":
        if t.has("sample_rate_hz"):
            raise t.error("sample_rate_hz", "an analog filter has no sample rate; remove it or "
                                            "set domain = \"digital\"")
        return None
    if required and not t.has("sample_rate_hz"):
        raise t.error("sample_rate_hz", "missing key (digital coefficients need the sample rate "
                                        "they were made for)")
    return t.float("sample_rate_hz", None, min=0.0, min_exclusive=True)


def _parse_design(t: Table) -> FilterSpec:
    t.check_known(_DESIGN_KEYS)
    family = t.str("family", choices=FAMILIES)
    notchy = family in ("iirnotch", "iirpeak")
    domain = t.str("domain", "digital" if notchy else None, choices=DOMAINS)
    if domain is None:
        raise t.error("domain", "missing key (analog or digital)")
    if notchy and domain != "digital":
        raise t.error("domain", f"{family} is a digital design (scipy.signal.{family}); use "
                                "domain = \"digital\", or an analog band-stop/band-pass design")
    fs = _parse_rate(t, domain, required=False)

    # cutoff
    if not t.has("cutoff_hz"):
        raise t.error("cutoff_hz", "missing key")
    raw = t.data["cutoff_hz"]
    if isinstance(raw, list):
        if len(raw) != 2:
            raise t.error("cutoff_hz", f"must be a number or a [low, high] pair, got {len(raw)} values")
        lo = t.check_float("cutoff_hz[0]", raw[0], min=0.0, min_exclusive=True)
        hi = t.check_float("cutoff_hz[1]", raw[1], min=0.0, min_exclusive=True)
        if not lo < hi:
            raise t.error("cutoff_hz", f"low edge {lo:g} Hz must be below high edge {hi:g} Hz")
        cutoff: float | tuple[float, float] = (lo, hi)
    else:
        cutoff = t.float("cutoff_hz", min=0.0, min_exclusive=True)

    # order / btype
    if notchy:
        for n in ("order", "btype"):
            if t.has(n):
                raise t.error(n, f"not used by {family} (always a second-order "
                                 f"{'notch' if family == 'iirnotch' else 'peak'})")
        if isinstance(cutoff, tuple):
            raise t.error("cutoff_hz", f"{family} takes one centre frequency, not a pair")
        order, btype = None, "bandstop" if family == "iirnotch" else "bandpass"
    else:
        order = t.int("order", min=1, max=MAX_ORDER)
        if family == "linkwitz_riley" and order % 2:
            raise t.error("order", f"a Linkwitz-Riley order must be even (the square of a "
                                   f"Butterworth of half the order), got {order}")
        btype = t.str("btype", "lowpass", choices=BTYPES)
        if family == "linkwitz_riley" and btype not in ("lowpass", "highpass"):
            raise t.error("btype", "linkwitz_riley is a crossover design: lowpass or highpass")
        band = btype in ("bandpass", "bandstop")
        if band and not isinstance(cutoff, tuple):
            raise t.error("cutoff_hz", f"a {btype} design needs a [low, high] pair")
        if not band and isinstance(cutoff, tuple):
            raise t.error("cutoff_hz", f"a [low, high] pair needs btype = \"bandpass\" or "
                                       f"\"bandstop\" (btype is {btype!r})")

    # family parameters
    needs = {"rp_db": ("cheby1", "ellip"), "rs_db": ("cheby2", "ellip"),
             "q": ("iirnotch", "iirpeak"), "norm": ("bessel",)}
    values: dict[str, Any] = {}
    for name, fams in needs.items():
        if family not in fams:
            if t.has(name):
                raise t.error(name, f"not used by {family} (only by {', '.join(fams)})")
            values[name] = None
        elif name == "norm":
            values[name] = t.str(name, "phase", choices=BESSEL_NORMS)
        else:
            values[name] = t.float(name, min=0.0, min_exclusive=True)
    if family == "ellip" and values["rs_db"] <= values["rp_db"]:
        raise t.error("rs_db", f"stop-band attenuation {values['rs_db']:g} dB must exceed the "
                               f"pass-band ripple {values['rp_db']:g} dB")
    if fs is not None:
        edge = max(np.atleast_1d(cutoff))
        if edge >= fs / 2:
            raise t.error("cutoff_hz", f"{edge:g} Hz is not below half the sample rate ({fs / 2:g} Hz)")
    spec = DesignSpec(family=family, cutoff_hz=cutoff, order=order, btype=btype, **values)
    result = FilterSpec(form="design", domain=domain, sample_rate_hz=fs, design=spec)
    _check_buildable(t, result)
    return result


def _check_buildable(t: Table, spec: FilterSpec) -> None:
    """Run the scipy design once so impossible combinations fail at load time."""
    try:
        if spec.analog:
            spec.analog_zpk()
        elif spec.sample_rate_hz is not None:
            spec.digital_sos(spec.sample_rate_hz, t.file)
    except ConfigError:
        raise
    except (ValueError, ArithmeticError) as exc:
        raise t.error(None, f"scipy.signal cannot build this filter: {exc}") from None


def _complex_list(t: Table, name: str, allow_empty: bool) -> list[complex]:
    value = t.data.get(name)
    if value is None:
        raise t.error(name, "missing key")
    if not isinstance(value, list):
        raise t.error(name, "must be an array of numbers or [re, im] pairs")
    if not value and not allow_empty:
        raise t.error(name, "must not be empty")
    out = []
    for i, item in enumerate(value):
        if isinstance(item, list):
            if len(item) != 2:
                raise t.error(f"{name}[{i}]", f"a complex number is written [re, im], got {len(item)} values")
            re_ = t.check_float(f"{name}[{i}][0]", item[0])
            im_ = t.check_float(f"{name}[{i}][1]", item[1])
            out.append(complex(re_, im_))
        else:
            out.append(complex(t.check_float(f"{name}[{i}]", item)))
    return out


def _check_conjugates(t: Table, name: str, roots: np.ndarray) -> None:
    """Complex roots of a real filter come in conjugate pairs."""
    if roots.size == 0:
        return
    scale = max(1.0, float(np.max(np.abs(roots))))
    pos = np.sort_complex(roots[roots.imag > 1e-12 * scale])
    neg = np.sort_complex(np.conj(roots[roots.imag < -1e-12 * scale]))
    if pos.size != neg.size or not np.allclose(pos, neg, rtol=1e-9, atol=1e-12 * scale):
        raise t.error(name, "complex roots must come in conjugate pairs (a real board has a real "
                            "impulse response); add the missing conjugates")


def _check_stable(t: Table, name: str, poles: np.ndarray, domain: str) -> None:
    if domain == "analog":
        bad = poles[poles.real >= 0]
        if bad.size:
            raise t.error(name, f"unstable: pole at {bad[0]:.6g} rad/s is not in the left half-plane")
    else:
        bad = poles[np.abs(poles) >= 1.0]
        if bad.size:
            raise t.error(name, f"unstable: pole at |z| = {abs(bad[0]):.6g} is not inside the unit circle")


def _parse_coefficients(t: Table, form: str) -> FilterSpec:
    t.check_known(_ZPK_KEYS if form == "zpk" else _BA_KEYS)
    domain = t.str("domain", choices=DOMAINS)
    fs = _parse_rate(t, domain, required=True)
    if form == "zpk":
        z = np.array(_complex_list(t, "z", allow_empty=True), complex)
        p = np.array(_complex_list(t, "p", allow_empty=domain == "digital"), complex)
        k = t.float("k")
        if k == 0:
            raise t.error("k", "gain 0 makes a board with no output; use fault = \"open\" for that")
        _check_conjugates(t, "z", z)
        _check_conjugates(t, "p", p)
        if domain == "analog" and z.size > p.size:
            raise t.error("z", f"{z.size} zeros but {p.size} poles: an analog filter needs at most "
                               "as many zeros as poles (a realisable, proper response)")
        _check_stable(t, "p", p, domain)
        z = np.where(np.abs(z.imag) <= 1e-12 * max(1.0, float(np.max(np.abs(z), initial=0))), z.real, z)
        p = np.where(np.abs(p.imag) <= 1e-12 * max(1.0, float(np.max(np.abs(p), initial=0))), p.real, p)
        result = FilterSpec(form="zpk", domain=domain, sample_rate_hz=fs,
                            z=tuple(complex(v) for v in z), p=tuple(complex(v) for v in p), k=k)
    else:
        b = t.float_list("b")
        a = t.float_list("a")
        if a[0] == 0:
            raise t.error("a[0]", "leading denominator coefficient must not be 0")
        if not any(b):
            raise t.error("b", "all-zero numerator makes a board with no output; use fault = \"open\"")
        b = list(np.trim_zeros(np.array(b), "f")) if domain == "analog" else b
        a = list(np.trim_zeros(np.array(a), "f")) if domain == "analog" else a
        if domain == "analog" and len(b) > len(a):
            raise t.error("b", f"numerator degree {len(b) - 1} exceeds denominator degree {len(a) - 1}: "
                               "an analog filter must be proper")
        _check_stable(t, "a", np.roots(a).astype(complex), domain)
        result = FilterSpec(form="ba", domain=domain, sample_rate_hz=fs,
                            b=tuple(float(v) for v in b), a=tuple(float(v) for v in a))
    _check_buildable(t, result)
    return result


def _parse_sos(t: Table) -> FilterSpec:
    rows = t.data["sos"]
    if not isinstance(rows, list) or not rows:
        raise t.error("sos", "must be a non-empty array of rows [b0, b1, b2, a0, a1, a2]")
    out = []
    for i, row in enumerate(rows):
        if not isinstance(row, list) or len(row) != 6:
            raise t.error(f"sos[{i}]", "must be a row of 6 numbers [b0, b1, b2, a0, a1, a2]")
        vals = [t.check_float(f"sos[{i}][{j}]", v) for j, v in enumerate(row)]
        if vals[3] == 0:
            raise t.error(f"sos[{i}][3]", "a0 must not be 0")
        out.append(tuple(v / vals[3] for v in vals))
    if not t.has("sample_rate_hz"):
        raise t.error("sample_rate_hz", "missing key (sos coefficients need the sample rate they "
                                        "were made for)")
    fs = t.float("sample_rate_hz", min=0.0, min_exclusive=True)
    sos = np.array(out)
    _, poles, _ = signal.sos2zpk(sos)
    _check_stable(t, "sos", np.asarray(poles, complex), "digital")
    return FilterSpec(form="sos", domain="digital", sample_rate_hz=fs, sos=tuple(out))


def _parse_imperfections(t: Table | None) -> Imperfections:
    if t is None:
        return Imperfections()
    t.check_known(_IMPERFECTION_KEYS)
    d = Imperfections()
    dropout_at = t.float("dropout_at_s", None, min=0.0)
    dropout_n = t.int("dropout_samples", 0, min=0, max=10_000_000)
    if dropout_at is not None and dropout_n == 0:
        raise t.error("dropout_samples", "must be at least 1 when dropout_at_s is given")
    if dropout_at is None and dropout_n:
        raise t.error("dropout_at_s", "missing key (dropout_samples needs dropout_at_s)")
    return Imperfections(
        gain_error_db=t.float("gain_error_db", d.gain_error_db, min=-60.0, max=60.0),
        input_noise_dbfs=t.float("input_noise_dbfs", None, max=0.0),
        output_noise_dbfs=t.float("output_noise_dbfs", None, max=0.0),
        latency_samples=t.float("latency_samples", d.latency_samples, min=0.0, max=1e6),
        dc_offset=t.float("dc_offset", d.dc_offset, min=-1.0, max=1.0),
        clock_offset_ppm=t.float("clock_offset_ppm", d.clock_offset_ppm, min=-1000.0, max=1000.0),
        hum_hz=t.float("hum_hz", d.hum_hz, min=0.0, min_exclusive=True),
        hum_dbfs=t.float("hum_dbfs", None, max=0.0),
        clip_level=t.float("clip_level", None, min=0.0, min_exclusive=True, max=10.0),
        third_order_distortion=t.float("third_order_distortion", 0.0, min=-10.0, max=10.0),
        dropout_at_s=dropout_at,
        dropout_samples=dropout_n,
        fault=t.str("fault", "none", choices=FAULTS),
        seed=t.int("seed", d.seed, min=0, max=2**63 - 1),
    )


def _design(d: DesignSpec, wn, *, analog: bool, fs: float | None):
    """Call the scipy.signal design function of a classic family."""
    out = "zpk" if analog else "sos"
    kw: dict[str, Any] = {"btype": d.btype, "analog": analog, "output": out}
    if not analog:
        kw["fs"] = fs
    if d.family == "butter":
        return signal.butter(d.order, wn, **kw)
    if d.family == "cheby1":
        return signal.cheby1(d.order, d.rp_db, wn, **kw)
    if d.family == "cheby2":
        return signal.cheby2(d.order, d.rs_db, wn, **kw)
    if d.family == "ellip":
        return signal.ellip(d.order, d.rp_db, d.rs_db, wn, **kw)
    if d.family == "bessel":
        return signal.bessel(d.order, wn, norm=d.norm or "phase", **kw)
    raise ValueError(f"unknown family {d.family!r}")


# --------------------------------------------------------------------------------------
# writing
def _cplx(v: complex) -> Any:
    v = complex(v)
    return v.real if v.imag == 0 else [v.real, v.imag]


def _filter_to_dict(f: FilterSpec) -> dict:
    if f.form == "sos":
        return {"sos": [list(r) for r in f.sos], "sample_rate_hz": f.sample_rate_hz}
    if f.form == "design":
        d = f.design
        out: dict[str, Any] = {"family": d.family}
        if d.order is not None:
            out["order"] = d.order
        out["cutoff_hz"] = list(d.cutoff_hz) if isinstance(d.cutoff_hz, tuple) else d.cutoff_hz
        if d.family not in ("iirnotch", "iirpeak"):
            out["btype"] = d.btype
        out["domain"] = f.domain
        for name in ("rp_db", "rs_db", "q", "norm"):
            if getattr(d, name) is not None:
                out[name] = getattr(d, name)
    elif f.form == "zpk":
        out = {"z": [_cplx(v) for v in f.z], "p": [_cplx(v) for v in f.p], "k": f.k, "domain": f.domain}
    else:
        out = {"b": list(f.b), "a": list(f.a), "domain": f.domain}
    if f.sample_rate_hz is not None:
        out["sample_rate_hz"] = f.sample_rate_hz
    return {f.form: out}


def _toml_value(v: Any) -> str:
    """TOML text of a scalar, array or inline table (the subset device models use)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"cannot write {v} to TOML")
        return repr(v)  # shortest round-trip form; valid TOML (1e-05, 18000.0)
    if isinstance(v, str):
        return json.dumps(v)  # a JSON string is a valid TOML basic string
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


# --------------------------------------------------------------------------------------
# production lots
DEFAULT_SPREAD = {
    "cutoff_pct": 1.0,        # 1-sigma, %: cutoff / centre frequency (analog forms)
    "bandwidth_pct": 2.0,     # 1-sigma, %: log-bandwidth of [low, high] designs (analog)
    "ripple_pct": 5.0,        # 1-sigma, %: rp_db and rs_db (analog cheby1/cheby2/ellip)
    "q_pct": 0.0,             # 1-sigma, %: q of iirnotch/iirpeak (digital: exact by default)
    "gain_db": 0.05,          # 1-sigma, dB: added to gain_error_db
    "latency_samples": 0.02,  # 1-sigma, samples: added to latency_samples (kept >= 0)
    "dc_offset": 0.0,         # 1-sigma, full-scale units: added to dc_offset
    "oot_cutoff_pct": 10.0,   # deliberate cutoff shift of an out-of-tolerance unit, %
    "oot_gain_db": 1.5,       # deliberate gain error of an out-of-tolerance unit, dB
}


def generate_lot(nominal: DeviceModel, n: int, *, spread: dict | None = None, seed: int = 0,
                 serial_prefix: str | None = None,
                 out_of_tolerance: int | float = 0.1) -> list[tuple[str, DeviceModel]]:
    """A simulated production lot: `n` perturbed copies of `nominal` with serial numbers.

    Spread model (all draws independent, Gaussian, from ``numpy.random.default_rng(seed)``;
    `DEFAULT_SPREAD` holds the 1-sigma values, override any of them with `spread`):

    - Analog filters (component tolerance): every frequency of the filter scales by one
      common factor ``1 + N(0, cutoff_pct/100)`` (a design's cutoff or band centre; a zpk's
      roots, a ba's coefficients, keeping the gain at the scaled frequencies). Band designs
      also scale their log-bandwidth by ``1 + N(0, bandwidth_pct/100)``; rp_db and rs_db
      scale by ``1 + N(0, ripple_pct/100)``.
    - Digital filters are coefficient-exact: no frequency spread, except q of
      iirnotch/iirpeak when ``q_pct`` > 0.
    - Every unit: ``gain_error_db += N(0, gain_db)``, ``latency_samples += N(0,
      latency_samples)`` (kept >= 0), ``dc_offset += N(0, dc_offset)``, and its own seed.
    - Out-of-tolerance units (``out_of_tolerance``: a count when an int, a fraction of `n`
      when a float, rounded) are picked at random; each gets, on top of its spread, either
      a cutoff shift of +-``oot_cutoff_pct`` % (analog filters only) or a gain error of
      +-``oot_gain_db`` dB, sign and kind at random. Its ``note`` says which.

    Parameters
    ----------
    nominal : DeviceModel
        The design centre.
    n : int
        Number of units (>= 1).
    spread : dict, optional
        Overrides of `DEFAULT_SPREAD` (unknown keys raise ConfigError).
    seed : int
        Lot seed: equal seeds give equal lots.
    serial_prefix : str, optional
        Serial numbers are ``f"{serial_prefix}-{i:04d}"``, i = 1..n. Default: the
        alphanumerics of ``nominal.model`` (or ``id``), upper case, then the seed as four
        digits, e.g. ``KA200-0000-0001``.
    out_of_tolerance : int or float
        Count (int) or fraction (float in [0, 1]) of deliberately bad units.

    Returns
    -------
    list of (serial, DeviceModel)
        The model's ``id`` is the serial number.
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ConfigError(None, "n", f"lot size must be a whole number >= 1, got {n!r}")
    sp = dict(DEFAULT_SPREAD)
    for key, value in (spread or {}).items():
        if key not in DEFAULT_SPREAD:
            near = difflib.get_close_matches(key, list(DEFAULT_SPREAD), n=1, cutoff=0.6)
            hint = f"; did you mean '{near[0]}'?" if near else f"; known keys: {', '.join(DEFAULT_SPREAD)}"
            raise ConfigError(None, f"spread.{key}", f"unknown key{hint}")
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not value >= 0:
            raise ConfigError(None, f"spread.{key}", f"must be a number >= 0, got {value!r}")
        sp[key] = float(value)
    if isinstance(out_of_tolerance, bool) or not isinstance(out_of_tolerance, (int, float, np.integer, np.floating)):
        raise ConfigError(None, "out_of_tolerance", f"must be a count or a fraction, got {out_of_tolerance!r}")
    if isinstance(out_of_tolerance, (float, np.floating)):
        if not 0.0 <= out_of_tolerance <= 1.0:
            raise ConfigError(None, "out_of_tolerance", f"a fraction must lie in [0, 1], got {out_of_tolerance}")
        n_bad = int(round(out_of_tolerance * n))
    else:
        if not 0 <= out_of_tolerance <= n:
            raise ConfigError(None, "out_of_tolerance", f"count must lie in 0..{n}, got {out_of_tolerance}")
        n_bad = int(out_of_tolerance)
    if serial_prefix is None:
        base = re.sub(r"[^A-Za-z0-9]", "", nominal.model or nominal.id).upper() or "UNIT"
        serial_prefix = f"{base}-{seed % 10000:04d}"

    rng = np.random.default_rng(seed)
    bad = set(rng.choice(n, size=n_bad, replace=False).tolist()) if n_bad else set()
    freq_spread = nominal.filter.analog
    lot = []
    for i in range(n):
        serial = f"{serial_prefix}-{i + 1:04d}"
        f_scale = 1.0 + rng.normal(0.0, sp["cutoff_pct"] / 100.0)
        bw_scale = 1.0 + rng.normal(0.0, sp["bandwidth_pct"] / 100.0)
        rip_scale = 1.0 + rng.normal(0.0, sp["ripple_pct"] / 100.0)
        q_scale = 1.0 + rng.normal(0.0, sp["q_pct"] / 100.0)
        d_gain = rng.normal(0.0, sp["gain_db"])
        d_lat = rng.normal(0.0, sp["latency_samples"])
        d_dc = rng.normal(0.0, sp["dc_offset"])
        unit_seed = int(rng.integers(0, 2**31 - 1))
        mode_draw, sign = rng.random(), (1.0 if rng.random() < 0.5 else -1.0)
        note = "lot unit within the normal spread"
        if i in bad:
            if freq_spread and mode_draw < 0.5:
                f_scale *= 1.0 + sign * sp["oot_cutoff_pct"] / 100.0
                note = f"deliberately out of tolerance: cutoff shifted {sign * sp['oot_cutoff_pct']:+g} %"
            else:
                d_gain += sign * sp["oot_gain_db"]
                note = f"deliberately out of tolerance: gain error {sign * sp['oot_gain_db']:+g} dB"
        filt = nominal.filter
        if freq_spread:
            filt = _scale_filter(filt, max(f_scale, 0.05), max(bw_scale, 0.05), max(rip_scale, 0.05))
        elif filt.form == "design" and filt.design.q is not None and sp["q_pct"] > 0:
            filt = dataclasses.replace(filt, design=dataclasses.replace(
                filt.design, q=filt.design.q * max(q_scale, 0.05)))
        imp = nominal.imperfections
        imp = dataclasses.replace(
            imp,
            gain_error_db=float(np.clip(imp.gain_error_db + d_gain, -60.0, 60.0)),
            latency_samples=float(max(0.0, imp.latency_samples + d_lat)),
            dc_offset=float(np.clip(imp.dc_offset + d_dc, -1.0, 1.0)),
            seed=unit_seed,
        )
        unit = dataclasses.replace(nominal, id=serial, filter=filt, imperfections=imp,
                                   note=note, source=None)
        lot.append((serial, unit))
    return lot


def _scale_filter(f: FilterSpec, scale: float, bw_scale: float, ripple_scale: float) -> FilterSpec:
    """Analog filter with every frequency multiplied by `scale`: H_new(s) = H(s / scale)."""
    if f.form == "design":
        d = f.design
        if isinstance(d.cutoff_hz, tuple):
            lo, hi = d.cutoff_hz
            centre, ratio = math.sqrt(lo * hi) * scale, (hi / lo) ** bw_scale
            cutoff: Any = (centre / math.sqrt(ratio), centre * math.sqrt(ratio))
        else:
            cutoff = d.cutoff_hz * scale
        rp = d.rp_db * ripple_scale if d.rp_db is not None else None
        rs = d.rs_db * ripple_scale if d.rs_db is not None else None
        if rp is not None and rs is not None and rs <= rp:
            rs = rp * 1.5
        return dataclasses.replace(f, design=dataclasses.replace(d, cutoff_hz=cutoff, rp_db=rp, rs_db=rs))
    if f.form == "zpk":
        # H(s/a) = k a^(np - nz) prod(s - a z) / prod(s - a p)
        k = f.k * scale ** (len(f.p) - len(f.z))
        return dataclasses.replace(f, z=tuple(v * scale for v in f.z), p=tuple(v * scale for v in f.p), k=k)
    # ba, highest power first: the coefficient of s^i scales by a^-i
    b = tuple(c * scale ** -(len(f.b) - 1 - i) for i, c in enumerate(f.b))
    a = tuple(c * scale ** -(len(f.a) - 1 - i) for i, c in enumerate(f.a))
    return dataclasses.replace(f, b=b, a=a)
