"""Filter designs (coefficients) scored against a tolerance mask, with no hardware.

``harness design-check PROFILE COEFFS`` loads a profile and a coefficient file, evaluates
the design's exact frequency response against the profile's mask so densely that no
notch or ripple peak can hide between evaluated frequencies (see `evaluate_design`),
optionally scores the same design rounded to fixed point (`quantize_sos`), prints a
per-band table and writes a Bode plot.

Coefficient files
-----------------
The file type follows the extension: ``.json``, ``.csv`` or ``.npz``.

JSON (one object; keys not listed here are an error, with a suggestion)::

    {
      "schema": 1,                       # optional; 1 is the only version
      "format": "sos" | "ba" | "zpk",    # required
      "domain": "digital" | "analog",    # optional, default "digital"
      "sample_rate_hz": 48000,           # required for digital, not allowed for analog
      "sos": [[b0, b1, b2, a0, a1, a2], ...],   # format "sos"
      "b": [b0, b1, ...], "a": [a0, a1, ...],   # format "ba"
      "z": [...], "p": [...], "k": 1.0,         # format "zpk"
      "id": "...", "title": "...", "comment": "..."   # optional strings
    }

* Digital ``sos`` rows and ``b``/``a`` are coefficients of ascending powers of z^-1
  (scipy.signal.sosfilt / lfilter convention); ``a0`` must not be 0.
* Analog ``sos`` rows and ``b``/``a`` are coefficients of descending powers of s
  (scipy.signal.freqs convention, as ``butter(..., analog=True, output="sos")`` writes
  them; leading zeros are allowed, e.g. ``[0, 0, w, 0, 1, w]`` is first order).
* ``z`` and ``p`` hold complex numbers as ``[re, im]`` pairs (a plain number is a real
  root); complex roots must come in conjugate pairs (a real filter). ``k`` is a real
  number. Digital zpk is ``H(z) = k prod(z - z_i) / prod(z - p_i)`` (scipy.signal.freqz_zpk);
  with more zeros than poles the filter would be non-causal, so poles at z = 0 are
  added (a pure delay of the difference in samples) and a note says so. Analog zpk is
  ``H(s) = k prod(s - z_i) / prod(s - p_i)`` with roots in rad/s.

CSV: one second-order section per row, six numbers ``b0, b1, b2, a0, a1, a2`` separated
by commas, semicolons or white space; an optional header row ``b0,b1,b2,a0,a1,a2``.
Lines starting with ``#`` are comments; a comment of the form ``# key = value`` is a
directive, one of ``sample_rate_hz`` (alias ``fs``), ``domain``, ``id``, ``title``,
``comment`` (any other ``# key = value`` is an error, so typos are caught). Without a
sample-rate directive a digital CSV design takes the sample rate of the (digital)
profile it is checked against, and the report says so.

NumPy ``.npz``: arrays ``sos`` (n, 6), or ``b`` and ``a`` (1-D), or ``z``, ``p`` (1-D,
real or complex) and ``k`` (scalar); a scalar ``sample_rate_hz`` or ``fs`` (not both);
an optional 0-d string ``domain``, and optional 0-d strings ``id``, ``title``, ``comment``.

Every problem raises `harness.errors.ConfigError` naming the file, the key (``sos[2][3]``,
``line 4``, ``z[1]``) and what is wrong. A design that is not stable (a pole on or outside
the unit circle, or on or right of the imaginary axis) is evaluated, warned about, and
fails the check: hardware built from it would oscillate or saturate.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import re
import sys
import warnings
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from scipy import optimize, signal

from harness.errors import ConfigError
from harness.mask import BandResult, Mask, MaskResult, PhaseResult, PhaseRule, margin

DOMAINS = ("digital", "analog")
FORMATS = ("sos", "ba", "zpk")
_JSON_KEYS = ("schema", "format", "domain", "sample_rate_hz", "sos", "b", "a", "z", "p", "k",
              "id", "title", "comment")
_FORMAT_KEYS = {"sos": ("sos",), "ba": ("b", "a"), "zpk": ("z", "p", "k")}
_ALIASES = {"fs": "sample_rate_hz", "sample_rate": "sample_rate_hz", "samplerate": "sample_rate_hz",
            "rate": "sample_rate_hz", "num": "b", "den": "a", "numerator": "b", "denominator": "a",
            "zeros": "z", "poles": "p", "gain": "k", "type": "format", "name": "id", "description": "comment"}
_CSV_DIRECTIVES = ("sample_rate_hz", "fs", "domain", "id", "title", "comment")
_NPZ_KEYS = ("sos", "b", "a", "z", "p", "k", "sample_rate_hz", "fs", "domain", "id", "title", "comment")
_SOS_COLUMNS = ("b0", "b1", "b2", "a0", "a1", "a2")
_DB = 20.0 / math.log(10.0)          # dB per neper of |H|: 20 log10(x) = _DB * ln(x)
SAFE_DB = 1.0    # a band proved this far above the limit (and the worst band) needs no exact worst


def _suggest(name: str, allowed: Sequence[str]) -> str:
    if name.lower() in _ALIASES and _ALIASES[name.lower()] in allowed:
        return f"; did you mean '{_ALIASES[name.lower()]}'?"
    near = difflib.get_close_matches(name, list(allowed), n=1, cutoff=0.6)
    if near:
        return f"; did you mean '{near[0]}'?"
    return f"; known keys: {', '.join(allowed)}"


# ======================================================================================
# the design
# ======================================================================================
@dataclass(frozen=True, eq=False)
class FilterDesign:
    """A linear time-invariant filter given by its coefficients.

    Build one with `FilterDesign.from_sos`, `from_ba` or `from_zpk`, or read one with
    `load_coefficients`. The coefficients are kept exactly as given (``sos`` or
    ``b``/``a`` or ``z``/``p``/``k``); the pole/zero form ``zeros``, ``poles``, ``gain``
    is always filled (computed with numpy.roots where needed) and is used for the group
    delay, the critical frequencies, the stability check and the evaluation bounds.

    Attributes
    ----------
    format : {'sos', 'ba', 'zpk'}
        The form the coefficients were given in.
    domain : {'digital', 'analog'}
    sample_rate_hz : float or None
        Sample rate of a digital design; None for an analog one.
    sos, b, a : ndarray or None
        The given coefficients (see the module docstring for the conventions).
    zeros, poles : ndarray of complex
        Roots in z (digital) or in rad/s (analog), in the convention
        ``H = gain * prod(x - zeros) / prod(x - poles)`` with x = e^{j omega} or s = j Omega.
    gain : float
    id, title, comment, source : str
        Metadata; ``source`` is the file the design came from (used in error messages).
    notes : tuple of str
        Facts the report should show (e.g. "sample rate taken from the profile").
    warnings : tuple of str
        Problems that do not stop the evaluation (e.g. an unstable pole).
    """

    format: str
    domain: str
    sample_rate_hz: float | None
    zeros: np.ndarray
    poles: np.ndarray
    gain: float
    sos: np.ndarray | None = None
    b: np.ndarray | None = None
    a: np.ndarray | None = None
    id: str = ""
    title: str = ""
    comment: str = ""
    source: str | None = None
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()

    # -- construction ---------------------------------------------------------------
    @classmethod
    def from_sos(cls, sos, sample_rate_hz: float | None = None, *, analog: bool = False,
                 key: str = "sos", **meta) -> "FilterDesign":
        """A design from second-order sections, shape (n, 6), rows ``[b0 b1 b2 a0 a1 a2]``.

        Digital rows are in ascending powers of z^-1 (``a0 != 0``); analog rows in
        descending powers of s. Raises ConfigError (file = ``meta['source']``) on bad input.
        """
        src = meta.get("source")
        domain = "analog" if analog else "digital"
        fs = _check_fs(sample_rate_hz, domain, src)
        arr = _real_array(sos, src, key, ndim=2)
        if arr.shape[0] < 1 or arr.shape[1] != 6:
            raise ConfigError(src, key, f"must have shape (sections, 6) with rows [b0, b1, b2, a0, a1, a2], "
                                        f"got shape {arr.shape}")
        zs, ps, k = [], [], 1.0
        for i, row in enumerate(arr):
            bb, aa = row[:3], row[3:]
            if not np.any(aa):
                raise ConfigError(src, f"{key}[{i}]", "denominator a0, a1, a2 is all zeros")
            if not analog and aa[0] == 0.0:
                raise ConfigError(src, f"{key}[{i}][3]", "a0 is 0: a digital section needs a0 != 0 "
                                                         "(rows are b0 b1 b2 a0 a1 a2 in powers of z^-1)")
            if not np.any(bb):
                raise ConfigError(src, f"{key}[{i}]", "numerator b0, b1, b2 is all zeros: the filter passes nothing")
            z, p, kk = _tf_roots(bb, aa, analog)
            zs.append(z)
            ps.append(p)
            k *= kk
        return cls._make("sos", domain, fs, np.concatenate(zs), np.concatenate(ps), k,
                         sos=arr, **meta)

    @classmethod
    def from_ba(cls, b, a, sample_rate_hz: float | None = None, *, analog: bool = False,
                **meta) -> "FilterDesign":
        """A design from transfer-function coefficients (powers of z^-1 for digital,
        descending powers of s for analog, as scipy.signal.freqz / freqs take them)."""
        src = meta.get("source")
        domain = "analog" if analog else "digital"
        fs = _check_fs(sample_rate_hz, domain, src)
        bb = _real_array(b, src, "b", ndim=1)
        aa = _real_array(a, src, "a", ndim=1)
        if bb.size == 0 or not np.any(bb):
            raise ConfigError(src, "b", "numerator is empty or all zeros: the filter passes nothing")
        if aa.size == 0 or not np.any(aa):
            raise ConfigError(src, "a", "denominator is empty or all zeros")
        if not analog and aa[0] == 0.0:
            raise ConfigError(src, "a[0]", "a[0] is 0: a digital denominator needs a[0] != 0")
        z, p, k = _tf_roots(bb, aa, analog)
        return cls._make("ba", domain, fs, z, p, k, b=bb, a=aa, **meta)

    @classmethod
    def from_zpk(cls, z, p, k, sample_rate_hz: float | None = None, *, analog: bool = False,
                 **meta) -> "FilterDesign":
        """A design from zeros, poles and gain (scipy.signal.freqz_zpk / freqs_zpk
        convention; analog roots in rad/s). Complex roots must come in conjugate pairs."""
        src = meta.get("source")
        domain = "analog" if analog else "digital"
        fs = _check_fs(sample_rate_hz, domain, src)
        zz = _conjugate_pairs(_complex_array(z, src, "z"), src, "z")
        pp = _conjugate_pairs(_complex_array(p, src, "p"), src, "p")
        kk = _finite_number(k, src, "k")
        if kk == 0.0:
            raise ConfigError(src, "k", "gain k is 0: the filter passes nothing")
        notes = list(meta.pop("notes", ()))
        if not analog and zz.size > pp.size:
            extra = zz.size - pp.size
            pp = np.concatenate([pp, np.zeros(extra, complex)])
            notes.append(f"{extra} pole(s) at z = 0 added (a delay of {extra} sample(s)) so the "
                         "filter is causal; the magnitude is unchanged")
        return cls._make("zpk", domain, fs, zz, pp, kk, notes=tuple(notes), **meta)

    @classmethod
    def _make(cls, fmt, domain, fs, z, p, k, *, notes=(), **kw) -> "FilterDesign":
        meta = {n: kw.pop(n) for n in ("id", "title", "comment", "source") if n in kw}
        for n in ("id", "title", "comment"):
            meta[n] = str(meta.get(n) or "")
        warns = []
        p = np.asarray(p, complex)
        if p.size:
            if domain == "digital":
                bad = p[np.abs(p) >= 1.0]
                if bad.size:
                    worst = bad[np.argmax(np.abs(bad))]
                    warns.append(f"not stable: {bad.size} pole(s) on or outside the unit circle "
                                 f"(largest |p| = {abs(worst):.6g} at {_fmt_c(worst)})")
            else:
                bad = p[p.real >= 0.0]
                if bad.size:
                    worst = bad[np.argmax(bad.real)]
                    warns.append(f"not stable: {bad.size} pole(s) on or right of the imaginary axis "
                                 f"(largest Re p = {worst.real:.6g} rad/s at {_fmt_c(worst)} rad/s)")
        if domain == "analog" and np.asarray(z).size > p.size:
            warns.append("improper: more zeros than poles, the gain grows without bound with frequency")
        return cls(format=fmt, domain=domain, sample_rate_hz=fs, zeros=np.asarray(z, complex), poles=p,
                   gain=float(k), notes=tuple(notes), warnings=tuple(warns), **kw, **meta)

    # -- description ----------------------------------------------------------------
    @property
    def digital(self) -> bool:
        return self.domain == "digital"

    @property
    def stable(self) -> bool:
        """True when every pole is strictly inside the unit circle (digital) or strictly
        in the left half plane (analog)."""
        if not self.poles.size:
            return True
        if self.digital:
            return bool(np.all(np.abs(self.poles) < 1.0))
        return bool(np.all(self.poles.real < 0.0))

    @property
    def order(self) -> int:
        """Filter order: the degree of the transfer function (sections summed for sos)."""
        if self.format == "sos":
            # degrees add up over the cascade (a section may carry two zeros and one pole)
            nb = sum(_degree(r[:3], self.digital) for r in self.sos)
            na = sum(_degree(r[3:], self.digital) for r in self.sos)
            return int(max(nb, na))
        if self.format == "ba":
            return int(max(_degree(self.b, self.digital), _degree(self.a, self.digital)))
        return int(max(self.zeros.size, self.poles.size))

    def describe(self) -> str:
        """One line: format, order, domain and sample rate."""
        form = {"sos": f"second-order sections ({self.sos.shape[0]})" if self.sos is not None else "sos",
                "ba": "transfer function b/a", "zpk": "zeros/poles/gain"}[self.format]
        where = f"digital, fs = {self.sample_rate_hz:g} Hz" if self.digital else "analog"
        return f"{form}, order {self.order}, {where}"

    # -- responses ------------------------------------------------------------------
    def response(self, freq_hz) -> np.ndarray:
        """Complex frequency response at `freq_hz` (Hz, array_like).

        Digital: scipy.signal.sosfreqz / freqz / freqz_zpk with ``fs``; analog:
        scipy.signal.freqs / freqs_zpk at ``2*pi*f`` rad/s (analog sections multiplied).
        """
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        if f.size == 0:
            return np.zeros(0, complex)
        fs = self.sample_rate_hz
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.digital:
                if self.format == "sos":
                    return signal.sosfreqz(self.sos, worN=f, fs=fs)[1]
                if self.format == "ba":
                    return signal.freqz(self.b, self.a, worN=f, fs=fs)[1]
                return signal.freqz_zpk(self.zeros, self.poles, self.gain, worN=f, fs=fs)[1]
            w = 2.0 * np.pi * f
            if self.format == "sos":
                h = np.ones(f.shape, complex)
                for row in self.sos:
                    h = h * signal.freqs(row[:3], row[3:], worN=w)[1]
                return h
            if self.format == "ba":
                return signal.freqs(self.b, self.a, worN=w)[1]
            return signal.freqs_zpk(self.zeros, self.poles, self.gain, worN=w)[1]

    def gain_db(self, freq_hz) -> np.ndarray:
        """``20 log10 |H|`` at `freq_hz` (-inf at an exact zero)."""
        with np.errstate(divide="ignore"):
            return 20.0 * np.log10(np.abs(self.response(freq_hz)))

    def group_delay_s(self, freq_hz) -> np.ndarray:
        """Exact group delay ``-d(phase)/d(omega)`` in seconds at `freq_hz`.

        A digital ``ba`` design uses scipy.signal.group_delay, unless scipy warns that
        its result is unreliable (singular points, ill-conditioned high-order
        polynomials); then the same derivative form is evaluated without scipy's
        polynomial product, ``tau = [Re(N1/N) - Re(D1/D)] / fs`` with
        ``N = sum b_n z^-n``, ``N1 = sum n b_n z^-n`` (likewise D, D1 from a), which
        needs no roots. Every other design uses the analytic sum over its poles and
        zeros, ``tau = -Im(d/domega ln H)``:
        digital, with x = e^{j omega}: ``tau = [sum_p Re(x/(x - p)) - sum_z Re(x/(x - z))] / fs``;
        analog, with s = j Omega: ``tau = sum_p Re(1/(s - p)) - sum_z Re(1/(s - z))``.
        Exactly at a zero on the unit circle (or on the imaginary axis) the phase jumps
        by pi; there the value of the limit beside it is returned.
        """
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        if f.size == 0:
            return np.zeros(0)
        if self.digital and self.format == "ba":
            fs = self.sample_rate_hz
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                _, gd = signal.group_delay((self.b, self.a), w=f, fs=fs)
            if not caught:
                return np.asarray(gd, float) / fs
            # scipy warns when its ratio (b times reversed a) is singular or too small to
            # trust: zeros on the unit circle, or a high-order polynomial (an 8th-order
            # elliptic b/a already gives it negative delays). Then use the same derivative
            # form without the product: tau = Re(N1/N) - Re(D1/D), N1 = sum n b_n z^-n.
            n = np.arange
            with np.errstate(divide="ignore", invalid="ignore"):
                tn = (_poly_z(n(self.b.size) * self.b, f, fs) / _poly_z(self.b, f, fs)).real
                td = (_poly_z(n(self.a.size) * self.a, f, fs) / _poly_z(self.a, f, fs)).real
            tau = tn - td
            bad = ~np.isfinite(tau)      # exactly on a zero: the pole/zero limit there
            if np.any(bad):
                tau[bad] = _group_delay_zpk(self.zeros, self.poles, f[bad], fs)[:] * fs
            return tau / fs
        return _group_delay_zpk(self.zeros, self.poles, f, self.sample_rate_hz)

    def critical_freqs_hz(self) -> np.ndarray:
        """Frequencies (Hz, sorted, >= 0) where a narrow peak or notch of |H| can sit.

        Digital: the angles of the poles and zeros, ``|angle| * fs / (2 pi)`` (roots at
        the origin have no angle and are skipped). Analog: ``|Im|`` of the poles and
        zeros and their natural frequencies ``|root|``, over 2 pi. A pole or zero near
        the unit circle (imaginary axis) makes a peak or notch of width about its
        distance from it, centred close to these frequencies.
        """
        r = np.concatenate([self.zeros, self.poles])
        if not r.size:
            return np.zeros(0)
        if self.digital:
            r = r[np.abs(r) > 1e-9]
            f = np.abs(np.angle(r)) * self.sample_rate_hz / (2.0 * np.pi)
        else:
            f = np.concatenate([np.abs(r.imag), np.abs(r)]) / (2.0 * np.pi)
        f = f[np.isfinite(f) & (f > 0)]
        return np.unique(f)

    def to_sos(self) -> np.ndarray:
        """Second-order sections of a digital design (``tf2sos`` / ``zpk2sos`` for ba / zpk)."""
        if not self.digital:
            raise ValueError("an analog design has no digital second-order sections")
        if self.format == "sos":
            return np.array(self.sos, float)
        if self.format == "ba":
            n = max(self.b.size, self.a.size)   # equal lengths: powers of z^-1, not of z
            return signal.tf2sos(np.pad(self.b, (0, n - self.b.size)), np.pad(self.a, (0, n - self.a.size)))
        return signal.zpk2sos(self.zeros, self.poles, self.gain)

    def _log_gain_db(self, freq_hz) -> np.ndarray:
        """20 log10 |H| by the cheapest faithful route, used as the objective of the
        scalar refinement and to check the pole/zero form against the response: the
        pole/zero form (sos, zpk, analog), or the b/a polynomials themselves for a
        digital b/a design (whose numpy.roots may be far off for long FIR filters)."""
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        if self.digital and self.format == "ba":
            n, d = _poly_z(self.b, f, self.sample_rate_hz), _poly_z(self.a, f, self.sample_rate_hz)
            with np.errstate(divide="ignore", invalid="ignore"):
                return 20.0 * np.log10(np.abs(n)) - 20.0 * np.log10(np.abs(d))
        return self._zpk_gain_db(f)

    def _zpk_gain_db(self, freq_hz) -> np.ndarray:
        """20 log10 |H| of the pole/zero form."""
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        x = _curve_point(f, self.sample_rate_hz)
        with np.errstate(divide="ignore"):
            g = 20.0 * np.log10(abs(self.gain)) + np.zeros(f.shape)
            if self.zeros.size:
                g = g + 20.0 * np.sum(np.log10(np.abs(x[:, None] - self.zeros[None, :])), axis=1)
            if self.poles.size:
                g = g - 20.0 * np.sum(np.log10(np.abs(x[:, None] - self.poles[None, :])), axis=1)
        return g


def _fmt_c(c: complex) -> str:
    return f"{c.real:.6g}{c.imag:+.6g}j" if c.imag else f"{c.real:.6g}"


def _degree(coeffs, digital: bool) -> int:
    nz = np.flatnonzero(np.asarray(coeffs) != 0)
    if not nz.size:
        return 0
    # digital: powers of z^-1, degree = last non-zero index; analog: descending powers of s
    return int(nz[-1]) if digital else int(len(coeffs) - 1 - nz[0])


def _tf_roots(b, a, analog: bool):
    """(zeros, poles, gain) of one transfer function, without scipy's sos2zpk padding.

    Written with numpy.roots instead of scipy.signal.sos2zpk because sos2zpk pads every
    section to two zeros, which for a section with b0 = 0 adds a zero at z = 0 and
    so a one-sample phase advance; and tf2zpk warns about the leading zeros that analog
    first-order sections legitimately have. Digital b and a are padded to equal length
    so that powers of z^-1 read as powers of z (the same transfer function).
    """
    b = np.asarray(b, float)
    a = np.asarray(a, float)
    if not analog:
        n = max(b.size, a.size)
        b = np.pad(b, (0, n - b.size))
        a = np.pad(a, (0, n - a.size))
    bt = np.trim_zeros(b, "f")
    at = np.trim_zeros(a, "f")
    return np.roots(bt).astype(complex), np.roots(at).astype(complex), float(bt[0] / at[0])


def _curve_point(freq_hz: np.ndarray, fs: float | None) -> np.ndarray:
    """e^{j omega} (digital) or j Omega (analog) at `freq_hz`."""
    if fs is not None:
        return np.exp(2j * np.pi * freq_hz / fs)
    return 2j * np.pi * freq_hz


def _poly_z(c, freq_hz, fs) -> np.ndarray:
    """``sum_n c[n] z^-n`` at z = e^{j 2 pi f / fs} (Horner, numpy.polyval)."""
    zm1 = np.exp(-2j * np.pi * np.asarray(freq_hz, float) / fs)
    return np.polyval(np.asarray(c)[::-1], zm1)


def _group_delay_zpk(z, p, freq_hz, fs) -> np.ndarray:
    x = _curve_point(freq_hz, fs)

    def term(roots):
        if not roots.size:
            return np.zeros(freq_hz.shape)
        d = x[:, None] - roots[None, :]
        with np.errstate(divide="ignore", invalid="ignore"):
            t = (x[:, None] / d).real if fs is not None else (1.0 / d).real
        # exactly on a root on the unit circle / imaginary axis: the limit beside it,
        # which is 1/2 (digital, |root| = 1) or 0 (analog, Re root = 0)
        t = np.where(np.isfinite(t), t, 0.5 if fs is not None else 0.0)
        return t.sum(axis=1)

    tau = term(np.asarray(p, complex)) - term(np.asarray(z, complex))
    return tau / fs if fs is not None else tau


# ======================================================================================
# validation helpers
# ======================================================================================
def _check_fs(fs, domain: str, src) -> float | None:
    if domain == "analog":
        if fs is not None:
            raise ConfigError(src, "sample_rate_hz", "an analog design has no sample rate; remove "
                                                     "sample_rate_hz or set domain to \"digital\"")
        return None
    if fs is None:
        raise ConfigError(src, "sample_rate_hz", "missing key: a digital design needs its sample rate "
                                                 "(or say \"domain\": \"analog\")")
    v = _finite_number(fs, src, "sample_rate_hz")
    if v <= 0:
        raise ConfigError(src, "sample_rate_hz", f"must be greater than 0, got {v:g}")
    return v


def _finite_number(v, src, key) -> float:
    if isinstance(v, np.ndarray) and v.size == 1:
        v = v.reshape(()).item()
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, float, np.integer, np.floating)):
        raise ConfigError(src, key, f"must be a number, got {_show(v)}")
    try:
        x = float(v)
    except OverflowError:
        raise ConfigError(src, key, "number too large") from None
    if not math.isfinite(x):
        raise ConfigError(src, key, f"must be a finite number, got {x}")
    return x


def _show(v) -> str:
    t = repr(v)
    return t if len(t) <= 60 else t[:57] + "..."


def _real_array(v, src, key, *, ndim: int) -> np.ndarray:
    """A finite real float array of `ndim` dimensions from nested lists or an ndarray,
    with errors naming the first bad element (``sos[2][3]``)."""
    if isinstance(v, np.ndarray):
        if v.dtype.kind not in "iuf" or v.dtype.kind == "b":
            if v.dtype.kind == "c" and not np.any(v.imag):
                v = v.real
            else:
                raise ConfigError(src, key, f"must hold real numbers, got an array of {v.dtype}")
        arr = np.asarray(v, float)
        if arr.ndim != ndim:
            raise ConfigError(src, key, f"must be a {ndim}-D array, got shape {arr.shape}")
        bad = np.argwhere(~np.isfinite(arr))
        if bad.size:
            idx = "".join(f"[{i}]" for i in bad[0])
            raise ConfigError(src, f"{key}{idx}", f"must be a finite number, got {arr[tuple(bad[0])]}")
        return arr
    if ndim == 1:
        if not isinstance(v, list):
            raise ConfigError(src, key, f"must be an array of numbers, got {_show(v)}")
        return np.array([_finite_number(x, src, f"{key}[{i}]") for i, x in enumerate(v)], float)
    if not isinstance(v, list) or not v:
        raise ConfigError(src, key, f"must be a non-empty array of rows [b0, b1, b2, a0, a1, a2], got {_show(v)}")
    rows = []
    for i, row in enumerate(v):
        if not isinstance(row, list) or len(row) != 6:
            n = f"{len(row)} values" if isinstance(row, list) else _show(row)
            raise ConfigError(src, f"{key}[{i}]", f"must be a row of 6 numbers [b0, b1, b2, a0, a1, a2], got {n}")
        rows.append([_finite_number(x, src, f"{key}[{i}][{j}]") for j, x in enumerate(row)])
    return np.array(rows, float)


def _complex_array(v, src, key) -> np.ndarray:
    if isinstance(v, np.ndarray):
        if v.dtype.kind not in "iufc" or v.dtype.kind == "b":
            raise ConfigError(src, key, f"must hold numbers, got an array of {v.dtype}")
        arr = np.atleast_1d(np.asarray(v, complex))
        if arr.ndim != 1:
            raise ConfigError(src, key, f"must be a 1-D array, got shape {arr.shape}")
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            raise ConfigError(src, f"{key}[{bad[0]}]", f"must be finite, got {arr[bad[0]]}")
        return arr
    if not isinstance(v, list):
        raise ConfigError(src, key, f"must be an array of roots (numbers or [re, im] pairs), got {_show(v)}")
    out = []
    for i, x in enumerate(v):
        if isinstance(x, list):
            if len(x) != 2:
                raise ConfigError(src, f"{key}[{i}]", f"a complex root is a pair [re, im], got {len(x)} values")
            out.append(complex(_finite_number(x[0], src, f"{key}[{i}][0]"),
                               _finite_number(x[1], src, f"{key}[{i}][1]")))
        else:
            out.append(complex(_finite_number(x, src, f"{key}[{i}]"), 0.0))
    return np.array(out, complex)


def _conjugate_pairs(roots: np.ndarray, src, key) -> np.ndarray:
    """Check that complex roots come in conjugate pairs (a real filter) and make each
    pair exactly conjugate. Tolerance 1e-8 relative (typed-in digits)."""
    r = np.array(roots, complex)
    scale = np.maximum(1.0, np.abs(r))
    cplx = np.flatnonzero(np.abs(r.imag) > 1e-12 * scale)
    neg = [i for i in cplx if r[i].imag < 0]
    used = set()
    for i in cplx:
        if r[i].imag <= 0:
            continue
        cands = [j for j in neg if j not in used]
        if cands:
            j = min(cands, key=lambda j: abs(r[j] - np.conj(r[i])))
            if abs(r[j] - np.conj(r[i])) <= 1e-8 * scale[i]:
                used.add(j)
                r[j] = np.conj(r[i])
                continue
        raise ConfigError(src, f"{key}[{i}]", f"complex root {_fmt_c(r[i])} has no conjugate partner "
                                              f"{_fmt_c(np.conj(r[i]))}; a real filter needs conjugate pairs")
    rest = [j for j in neg if j not in used]
    if rest:
        j = rest[0]
        raise ConfigError(src, f"{key}[{j}]", f"complex root {_fmt_c(r[j])} has no conjugate partner "
                                              f"{_fmt_c(np.conj(r[j]))}; a real filter needs conjugate pairs")
    r[np.abs(r.imag) <= 1e-12 * scale] = r[np.abs(r.imag) <= 1e-12 * scale].real
    return r


# ======================================================================================
# loading coefficient files
# ======================================================================================
def load_coefficients(path: str | Path, *, default_sample_rate_hz: float | None = None) -> FilterDesign:
    """Read a coefficient file (``.json``, ``.csv`` or ``.npz``; see the module docstring).

    Parameters
    ----------
    path : str or Path
    default_sample_rate_hz : float, optional
        Sample rate for a digital CSV file that states none (the profile's sample rate
        when called by design-check). JSON and .npz files must state their own.

    Returns
    -------
    FilterDesign

    Raises
    ------
    ConfigError
        Naming the file, the key and the problem, for every unreadable or invalid file.
    """
    p = Path(path)
    src = str(path)
    if p.is_dir():
        raise ConfigError(src, None, "is a directory, expected a coefficient file")
    if not p.exists():
        raise ConfigError(src, None, "file not found")
    ext = p.suffix.lower()
    if ext == ".json":
        return _load_json(p, src)
    if ext in (".csv", ".txt"):
        return _load_csv(p, src, default_sample_rate_hz)
    if ext == ".npz":
        return _load_npz(p, src)
    raise ConfigError(src, None, f"unknown coefficient file type '{p.suffix}'; use .json, .csv or .npz")


def _read_text(p: Path, src: str) -> str:
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise ConfigError(src, None, f"cannot read file ({exc.strerror})") from None
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ConfigError(src, None, f"not UTF-8 text (byte {exc.start})") from None


def _load_json(p: Path, src: str) -> FilterDesign:
    text = _read_text(p, src)
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ConfigError(src, None, f"JSON syntax error at line {exc.lineno} column {exc.colno}: {exc.msg}") from None
    except RecursionError:
        raise ConfigError(src, None, "JSON nested too deeply") from None
    if not isinstance(data, dict):
        raise ConfigError(src, None, f"must be a JSON object {{\"format\": ..., ...}}, got {type(data).__name__}")
    for name in data:
        if name not in _JSON_KEYS:
            raise ConfigError(src, name, "unknown key" + _suggest(name, _JSON_KEYS))
    if "schema" in data and (isinstance(data["schema"], bool) or data["schema"] != 1):
        raise ConfigError(src, "schema", f"unsupported schema {_show(data['schema'])}; this harness reads schema 1")
    if "format" not in data:
        guess = next((f for f, keys in _FORMAT_KEYS.items() if keys[0] in data), "sos")
        raise ConfigError(src, "format", f"missing key; add \"format\": \"{guess}\" (one of sos, ba, zpk)")
    fmt = data["format"]
    if fmt not in FORMATS:
        near = difflib.get_close_matches(str(fmt), FORMATS, n=1, cutoff=0.5)
        hint = f" (did you mean '{near[0]}'?)" if near else ""
        raise ConfigError(src, "format", f"unknown format {_show(fmt)}{hint}; expected one of sos, ba, zpk")
    domain = data.get("domain", "digital")
    if domain not in DOMAINS:
        raise ConfigError(src, "domain", f"unknown domain {_show(domain)}; expected \"digital\" or \"analog\"")
    for other, keys in _FORMAT_KEYS.items():
        for kname in keys:
            if other != fmt and kname in data and kname not in _FORMAT_KEYS[fmt]:
                raise ConfigError(src, kname, f"'{kname}' belongs to format '{other}', but this file says "
                                              f"format '{fmt}' (needs {', '.join(_FORMAT_KEYS[fmt])})")
    for kname in _FORMAT_KEYS[fmt]:
        if kname not in data:
            raise ConfigError(src, kname, f"missing key (format '{fmt}' needs {', '.join(_FORMAT_KEYS[fmt])})")
    meta = {"source": src}
    for n in ("id", "title", "comment"):
        if n in data:
            if not isinstance(data[n], str):
                raise ConfigError(src, n, f"must be a string, got {_show(data[n])}")
            meta[n] = data[n]
    fs = data.get("sample_rate_hz")
    analog = domain == "analog"
    if fmt == "sos":
        return FilterDesign.from_sos(data["sos"], fs, analog=analog, **meta)
    if fmt == "ba":
        return FilterDesign.from_ba(data["b"], data["a"], fs, analog=analog, **meta)
    return FilterDesign.from_zpk(data["z"], data["p"], data["k"], fs, analog=analog, **meta)


_DIRECTIVE = re.compile(r"^#\s*([A-Za-z_][A-Za-z0-9_]*)\s*=\s*(.*?)\s*$")
_FLOAT = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


def _load_csv(p: Path, src: str, default_fs: float | None) -> FilterDesign:
    text = _read_text(p, src)
    meta: dict[str, Any] = {"source": src}
    fs = None
    domain = "digital"
    rows, seen_data = [], False
    for n, line in enumerate(text.splitlines(), start=1):
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            m = _DIRECTIVE.match(s)
            if not m:
                continue                     # free comment
            name, value = m.group(1), m.group(2).strip().strip("\"'")
            key = f"line {n}: {name}"
            if name not in _CSV_DIRECTIVES:
                raise ConfigError(src, key, "unknown directive" + _suggest(name, _CSV_DIRECTIVES)
                                  + " (comments of the form '# key = value' are directives)")
            if name in ("sample_rate_hz", "fs"):
                if fs is not None:
                    raise ConfigError(src, key, "sample rate given twice")
                if not _FLOAT.match(value):
                    raise ConfigError(src, key, f"must be a number, got {value!r}")
                fs = float(value)
                if not (math.isfinite(fs) and fs > 0):
                    raise ConfigError(src, key, f"must be a finite number > 0, got {value!r}")
            elif name == "domain":
                if value not in DOMAINS:
                    raise ConfigError(src, key, f"unknown domain {value!r}; expected digital or analog")
                domain = value
            else:
                meta[name] = value
            continue
        fields = [x for x in re.split(r"[,;\s]+", s) if x]
        if not seen_data and not all(_FLOAT.match(x) for x in fields):
            seen_data = True
            if [x.lower() for x in fields] != list(_SOS_COLUMNS):
                raise ConfigError(src, f"line {n}", "not six numbers; the only header allowed is "
                                                    "b0,b1,b2,a0,a1,a2")
            continue
        seen_data = True
        if len(fields) != 6:
            raise ConfigError(src, f"line {n}", f"a section row needs 6 numbers b0 b1 b2 a0 a1 a2, got {len(fields)}")
        vals = []
        for col, x in zip(_SOS_COLUMNS, fields):
            if not _FLOAT.match(x):
                raise ConfigError(src, f"line {n}, {col}", f"not a number: {x!r}")
            v = float(x)
            if not math.isfinite(v):
                raise ConfigError(src, f"line {n}, {col}", f"must be finite, got {x!r}")
            vals.append(v)
        rows.append((n, vals))
    if not rows:
        raise ConfigError(src, None, "no section rows (b0,b1,b2,a0,a1,a2) found")
    notes = []
    if domain == "analog" and fs is not None:
        raise ConfigError(src, "sample_rate_hz", "an analog design has no sample rate; remove the directive")
    if domain == "digital" and fs is None:
        if default_fs is None:
            raise ConfigError(src, "sample_rate_hz", "missing: add a line '# sample_rate_hz = 48000' "
                                                     "(or '# domain = analog')")
        fs = float(default_fs)
        notes.append(f"sample rate {fs:g} Hz taken from the profile (the CSV file states none)")
    # map section index errors back to line numbers
    arr = np.array([v for _, v in rows], float)
    try:
        return FilterDesign.from_sos(arr, fs, analog=domain == "analog", notes=tuple(notes), **meta)
    except ConfigError as exc:
        m = re.match(r"sos\[(\d+)\](?:\[(\d+)\])?", exc.key or "")
        if m:
            line = rows[int(m.group(1))][0]
            col = f", {_SOS_COLUMNS[int(m.group(2))]}" if m.group(2) else ""
            raise ConfigError(src, f"line {line}{col}", exc.problem) from None
        raise


def _load_npz(p: Path, src: str) -> FilterDesign:
    try:
        with np.load(p, allow_pickle=False) as npz:
            data = {k: npz[k] for k in npz.files}
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as exc:
        raise ConfigError(src, None, f"not a readable NumPy .npz archive ({exc})") from None
    for name in data:
        if name not in _NPZ_KEYS:
            raise ConfigError(src, name, "unknown array" + _suggest(name, _NPZ_KEYS))
    meta: dict[str, Any] = {"source": src}
    for n in ("id", "title", "comment", "domain"):
        if n in data:
            v = data[n]
            if v.dtype.kind != "U" or v.size != 1:
                raise ConfigError(src, n, f"must be a string (0-d array), got {v.dtype} of shape {v.shape}")
            meta[n] = str(v.reshape(()).item())
    domain = meta.pop("domain", "digital")
    if domain not in DOMAINS:
        raise ConfigError(src, "domain", f"unknown domain {domain!r}; expected digital or analog")
    if "fs" in data and "sample_rate_hz" in data:
        raise ConfigError(src, "fs", "give sample_rate_hz or fs, not both")
    fs = None
    for n in ("sample_rate_hz", "fs"):
        if n in data:
            if data[n].size != 1:
                raise ConfigError(src, n, f"must be a scalar, got shape {data[n].shape}")
            fs = _finite_number(data[n], src, n)
            if domain == "digital" and fs <= 0:
                raise ConfigError(src, n, f"must be greater than 0, got {fs:g}")
    forms = [f for f, keys in _FORMAT_KEYS.items() if any(k in data for k in keys)]
    if not forms:
        raise ConfigError(src, None, "no coefficients: needs arrays sos, or b and a, or z, p and k")
    if len(forms) > 1:
        a, b = _FORMAT_KEYS[forms[0]][0], _FORMAT_KEYS[forms[1]][0]
        raise ConfigError(src, b, f"mixes formats ('{a}' and '{b}'); give one of sos, b/a, z/p/k")
    fmt = forms[0]
    for kname in _FORMAT_KEYS[fmt]:
        if kname not in data:
            raise ConfigError(src, kname, f"missing array (format '{fmt}' needs {', '.join(_FORMAT_KEYS[fmt])})")
    analog = domain == "analog"
    if analog and fs is not None:
        raise ConfigError(src, "sample_rate_hz" if "sample_rate_hz" in data else "fs",
                          "an analog design has no sample rate")
    if fmt == "sos":
        return FilterDesign.from_sos(data["sos"], fs, analog=analog, **meta)
    if fmt == "ba":
        return FilterDesign.from_ba(data["b"], data["a"], fs, analog=analog, **meta)
    if data["k"].size != 1:
        raise ConfigError(src, "k", f"must be a scalar, got shape {data['k'].shape}")
    k = data["k"].reshape(())
    if k.dtype.kind == "c":
        if k.imag != 0:
            raise ConfigError(src, "k", f"must be real, got {complex(k)}")
        k = k.real
    return FilterDesign.from_zpk(data["z"], data["p"], k, fs, analog=analog, **meta)


def check_compatible(design: FilterDesign, mask: Mask, *, profile_id: str = "", profile_path=None,
                     digital_profile: bool | None = None) -> None:
    """Raise ConfigError when a design cannot be scored against a mask: a digital design
    whose sample rate differs from a digital profile's, or a digital design whose Nyquist
    frequency lies below the mask's highest frequency. An analog design against a digital
    profile is fine (it is evaluated in Hz). `digital_profile` defaults to "the mask has
    a sample rate"; an analog profile may carry a converter's sample rate, which a
    digital design need not share."""
    if not design.digital:
        return
    fs = design.sample_rate_hz
    if digital_profile is None:
        digital_profile = mask.sample_rate_hz is not None
    pfs = mask.sample_rate_hz if digital_profile else None
    who = f"profile {profile_id}" if profile_id else "the profile"
    if pfs is not None and abs(fs - pfs) > 1e-9 * max(fs, pfs):
        raise ConfigError(design.source, "sample_rate_hz",
                          f"the design is for {fs:g} Hz but {who} ({profile_path or 'mask'}) is for {pfs:g} Hz; "
                          "a digital filter's response in Hz depends on its sample rate")
    if mask.f_max_hz > fs / 2.0 * (1 + 1e-12):
        raise ConfigError(design.source, "sample_rate_hz",
                          f"the mask reaches {mask.f_max_hz:g} Hz, beyond this design's Nyquist frequency "
                          f"{fs / 2:g} Hz (fs = {fs:g} Hz)")


# ======================================================================================
# fixed point
# ======================================================================================
@dataclass(frozen=True)
class QFormat:
    """Signed fixed-point format Qm.n: m integer bits INCLUDING the sign bit, n
    fractional bits, word length m + n. Representable values are the multiples of
    2^-n in ``[-2^(m-1), 2^(m-1) - 2^-n]`` (two's complement). Q1.15 is the 16-bit
    format with range [-1, 1 - 2^-15]; Q2.30 a 32-bit word with range [-2, 2 - 2^-30]."""

    int_bits: int
    frac_bits: int

    @property
    def spec(self) -> str:
        return f"Q{self.int_bits}.{self.frac_bits}"

    @property
    def word_bits(self) -> int:
        return self.int_bits + self.frac_bits

    @property
    def lsb(self) -> float:
        return 2.0 ** -self.frac_bits

    @property
    def min_value(self) -> float:
        return -(2.0 ** (self.int_bits - 1))

    @property
    def max_value(self) -> float:
        return 2.0 ** (self.int_bits - 1) - self.lsb

    def quantize(self, x) -> np.ndarray:
        """Round to the nearest multiple of 2^-n (ties to even); no range check."""
        return np.round(np.asarray(x, float) * 2.0 ** self.frac_bits) / 2.0 ** self.frac_bits

    def fits(self, x) -> np.ndarray:
        q = self.quantize(x)
        return (q >= self.min_value) & (q <= self.max_value)


_QSPEC = re.compile(r"^\s*[Qq](\d{1,3})\.(\d{1,3})\s*$")
MAX_WORD_BITS = 53   # float64 holds every Qm.n value exactly up to 53 significant bits


def parse_qformat(spec: str, *, key: str = "--quantize") -> QFormat:
    """Parse ``Qm.n`` (m >= 1 integer bits including the sign, n >= 0 fractional bits,
    m + n <= 53 so that float64 simulates the word exactly). Raises ConfigError naming
    `key` for anything else."""
    m = _QSPEC.match(str(spec))
    if not m:
        raise ConfigError(None, key, f"{spec!r} is not a fixed-point format; write Qm.n with m integer bits "
                                     "including the sign bit and n fractional bits, for example Q1.15 "
                                     "(16-bit word) or Q2.30 (32-bit word)")
    ib, fb = int(m.group(1)), int(m.group(2))
    if ib < 1:
        raise ConfigError(None, key, f"{spec}: m counts the sign bit, so it is at least 1 (for example Q1.15)")
    if ib + fb > MAX_WORD_BITS:
        raise ConfigError(None, key, f"{spec}: a {ib + fb}-bit word is longer than the {MAX_WORD_BITS} bits "
                                     "a float64 simulation represents exactly")
    if ib + fb < 2:
        raise ConfigError(None, key, f"{spec}: a word needs at least 2 bits")
    return QFormat(ib, fb)


@dataclass
class QuantReport:
    """What rounding a design's sections to a fixed-point format did.

    Attributes
    ----------
    qformat : QFormat
    sos_float : ndarray, shape (n, 6)
        The sections before rounding, each divided by its a0 (a0 = 1 is implicit in
        hardware and is not stored).
    sos_q : ndarray, shape (n, 6)
        The rounded sections (a0 = 1).
    error : ndarray, shape (n, 6)
        ``sos_q - sos_float`` (0 in the a0 column); every entry is at most 2^-(n+1).
    max_abs_error : float
    max_abs_coeff : float
        Largest stored coefficient magnitude.
    normalised : bool
        True if some section had a0 != 1 and was divided by it.
    max_pole_shift : float
        Largest distance between a pole of the float design and the nearest pole of
        the rounded design (in z).
    stable : bool
        Whether the rounded design is stable.
    """

    qformat: QFormat
    sos_float: np.ndarray
    sos_q: np.ndarray
    error: np.ndarray
    max_abs_error: float
    max_abs_coeff: float
    normalised: bool
    max_pole_shift: float
    stable: bool


def quantize_sos(sos, spec: str | QFormat, *, key: str = "--quantize") -> tuple[np.ndarray, QuantReport]:
    """Round digital second-order sections to the fixed-point format `spec`.

    Each section is first divided by its a0 (which then stays exactly 1 and is not
    stored); b0, b1, b2, a1, a2 are rounded to the nearest multiple of 2^-n. A
    coefficient outside the format's range after rounding is an error, never scaled or
    saturated silently: the message names the section and coefficient and suggests the
    format of the same word length with enough integer bits (sos a1 coefficients often
    lie in [-2, 2], so Q1.15 frequently overflows where Q2.14 or Q3.13 fits).

    Parameters
    ----------
    sos : array_like, shape (n, 6)
    spec : str or QFormat
        ``"Qm.n"`` (see `parse_qformat`).
    key : str
        Option name used in error messages.

    Returns
    -------
    sos_q : ndarray, shape (n, 6)
    report : QuantReport

    Raises
    ------
    ConfigError
        Bad spec, or a coefficient out of range (file None, key `key`).
    """
    qf = spec if isinstance(spec, QFormat) else parse_qformat(spec, key=key)
    s = np.array(sos, float)
    if s.ndim != 2 or s.shape[1] != 6 or not s.shape[0]:
        raise ValueError("sos must have shape (n, 6)")
    a0 = s[:, 3:4]
    if np.any(a0 == 0):
        raise ValueError("a0 must be non-zero in every section")
    normalised = bool(np.any(a0 != 1.0))
    s = s / a0
    stored = np.ones(6, bool)
    stored[3] = False
    q = s.copy()
    q[:, stored] = qf.quantize(s[:, stored])
    over = np.argwhere(~qf.fits(s[:, stored]).reshape(s.shape[0], 5))
    if over.size:
        cols = [c for c, st in zip(_SOS_COLUMNS, stored) if st]
        i, j = over[0]
        val = s[i, [0, 1, 2, 4, 5][j]]
        biggest = float(np.max(np.abs(s[:, stored])))
        hint = _suggest_qformat(s[:, stored], qf)
        raise ConfigError(None, key,
                          f"{qf.spec} cannot hold section {i} coefficient {cols[j]} = {val:.10g}: the {qf.spec} range "
                          f"is [{qf.min_value:g}, {qf.max_value:.10g}] (after rounding to the nearest 2^-{qf.frac_bits})"
                          f"; {len(over)} coefficient(s) overflow, the largest |coefficient| is {biggest:.6g}. {hint} "
                          "Coefficients are never scaled or saturated silently.")
    dead = np.flatnonzero(~np.any(q[:, :3], axis=1))
    if dead.size:
        i = int(dead[0])
        raise ConfigError(None, key, f"{qf.spec} rounds every numerator coefficient of section {i} "
                                     f"(b = {', '.join(f'{x:.3g}' for x in s[i, :3])}) to 0: the quantised filter "
                                     f"would pass nothing; use more fractional bits (the LSB is {qf.lsb:.3g})")
    err = q - s
    zq, pq, _ = _sos_roots(q)
    _, pf, _ = _sos_roots(s)
    shift = _max_root_shift(pf, pq)
    stable = bool(np.all(np.abs(pq) < 1.0)) if pq.size else True
    return q, QuantReport(qf, s, q, err, float(np.max(np.abs(err))), float(np.max(np.abs(q[:, stored]))),
                          normalised, shift, stable)


def _suggest_qformat(coeffs: np.ndarray, qf: QFormat) -> str:
    w = qf.word_bits
    for ib in range(qf.int_bits + 1, w):
        cand = QFormat(ib, w - ib)
        if np.all(cand.fits(coeffs)):
            return (f"{cand.spec} (the same {w}-bit word with {ib} integer bits) holds every coefficient"
                    + (", so does Q2.14" if (w == 16 and ib > 2 and np.all(QFormat(2, 14).fits(coeffs))) else "")
                    + ".")
    need = int(math.floor(math.log2(max(float(np.max(np.abs(coeffs))), 1e-300)))) + 2
    return f"At least {need} integer bits are needed (for example Q{need}.{max(w - need, 0)} or a longer word)."


def _sos_roots(sos):
    zs, ps, k = [], [], 1.0
    for row in sos:
        z, p, kk = _tf_roots(row[:3], row[3:], False)
        zs.append(z)
        ps.append(p)
        k *= kk
    return np.concatenate(zs), np.concatenate(ps), k


def _max_root_shift(a: np.ndarray, b: np.ndarray) -> float:
    if not a.size or not b.size:
        return 0.0
    return float(np.max(np.min(np.abs(a[:, None] - b[None, :]), axis=1)))


def quantize_design(design: FilterDesign, spec: str | QFormat, *, key: str = "--quantize"
                    ) -> tuple[FilterDesign, QuantReport]:
    """The design rounded to fixed point: converted to sos first when given as ba or zpk
    (scipy.signal.tf2sos / zpk2sos), then `quantize_sos`. Analog designs have no
    fixed-point coefficients (ConfigError naming `key`)."""
    if not design.digital:
        raise ConfigError(None, key, "an analog design has no fixed-point coefficients; "
                                     "quantisation applies to digital designs")
    sos_q, rep = quantize_sos(design.to_sos(), spec, key=key)
    qd = FilterDesign.from_sos(sos_q, design.sample_rate_hz, id=f"{design.id or 'design'} @ {rep.qformat.spec}",
                               title=design.title, source=design.source)
    return qd, rep


# ======================================================================================
# dense evaluation
# ======================================================================================
@dataclass
class DesignResult:
    """A design evaluated against a mask (see `evaluate_design`).

    Attributes
    ----------
    design : FilterDesign
    mask : Mask
    freq_hz : ndarray
        Every frequency evaluated (base grid, edges, critical frequencies, refined and
        certification points), ascending, Hz.
    h : ndarray of complex
        Response at `freq_hz`.
    gain_db : ndarray
        Gain as compared with the mask (relative to the reference gain when the mask
        has a reference frequency).
    mask_result : MaskResult
        Gain evaluation on `freq_hz`; its ``phase`` is the phase rule evaluated on
        the phase grid (`phase_freq_hz`).
    phase_freq_hz, phase_deg, group_delay_s : ndarray
        The phase grid (base log grid, edges, critical frequencies, refined group-delay
        maxima), the phase there (continuous, unwrapped, degrees) and the exact group delay.
    reference_gain_db : float or None
        ``20 log10 |H(reference_hz)|``, exact.
    certified : bool
        True when every interval between evaluated frequencies was proved (see
        `evaluate_design`) to hold no margin more than ``tol_db`` below the reported
        worst margin of its band - or, for a band far from its limits, to hold no
        margin below the level in `loose_db`.
    cert_gap_db : float
        The largest amount by which an uncertified interval might still hide a worse
        margin (0 when certified).
    loose_db : dict of int to float
        Bands (index, -1 for the transition ceiling) whose worst margin is proved only
        to be at least this value, because they are at least ``SAFE_DB`` (1 dB) above
        both their limit and the overall worst margin; the overall worst margin and
        every verdict are exact regardless.
    n_base, n_refined, n_certify : int
        Points in the base grid, added by scalar refinement, added by certification.
    reasons : list of str
        Why the design fails (empty when it passes).
    """

    design: FilterDesign
    mask: Mask
    freq_hz: np.ndarray
    h: np.ndarray
    gain_db: np.ndarray
    mask_result: MaskResult
    phase_freq_hz: np.ndarray
    phase_deg: np.ndarray
    group_delay_s: np.ndarray
    reference_gain_db: float | None
    certified: bool
    cert_gap_db: float
    tol_db: float
    n_base: int
    n_refined: int
    n_certify: int
    reasons: list[str] = field(default_factory=list)
    loose_db: dict[int, float] = field(default_factory=dict)

    @property
    def bands(self) -> list[BandResult]:
        return self.mask_result.bands

    @property
    def phase(self) -> PhaseResult | None:
        return self.mask_result.phase

    @property
    def worst_margin_db(self) -> float:
        return self.mask_result.worst_margin_db

    @property
    def passed(self) -> bool:
        return self.mask_result.passed and self.design.stable


class _LimitSet:
    """One set of limits evaluated separately: a band (index >= 0) or the transition
    ceiling (index -1)."""

    def __init__(self, mask: Mask, index: int):
        self.mask = mask
        self.index = index
        self.band = mask.bands[index] if index >= 0 else None

    def covers(self, f) -> np.ndarray:
        f = np.asarray(f, float)
        if self.band is not None:
            return self.band.covers(f)
        cov = np.zeros(f.shape, bool)
        for b in self.mask.bands:
            cov |= b.covers(f)
        return ~cov

    def limits(self, f) -> tuple[np.ndarray, np.ndarray]:
        f = np.atleast_1d(np.asarray(f, float))
        if self.band is not None:
            return self.band.limits_at(f)
        cov = ~self.covers(f)
        hi = np.where(cov, np.inf, float(self.mask.transition_max_db))
        return np.full(f.shape, -np.inf), hi

    def margin(self, f, g) -> np.ndarray:
        lo, hi = self.limits(f)
        m = margin(g, lo, hi)
        return np.where(self.covers(f), m, np.nan)


def _base_grid(design: FilterDesign, mask: Mask, points: int) -> tuple[np.ndarray, np.ndarray]:
    """(gain grid, phase grid) before refinement."""
    f_min, f_max = mask.f_min_hz, mask.f_max_hz
    edges = mask.edges_hz()
    if f_min > 0:
        f_lo = f_min
    else:
        pos = edges[edges > 0]
        f_lo = min(1e-3 * f_max, 0.1 * float(pos.min())) if pos.size else 1e-3 * f_max
    logg = np.geomspace(f_lo, f_max, points)
    crit = design.critical_freqs_hz()
    crit = crit[(crit >= f_min) & (crit <= f_max)]
    extra = [edges, crit, [f_min, f_max]]
    if mask.reference_hz is not None:
        extra.append([mask.reference_hz])
    grid = [logg] + extra
    if design.digital:
        grid.append(np.linspace(f_min, f_max, max(points // 4, 2)))
    g = np.unique(np.clip(np.concatenate([np.asarray(x, float) for x in grid]), f_min, f_max))
    ph = np.unique(np.clip(np.concatenate([logg] + [np.asarray(x, float) for x in extra]), f_min, f_max))
    return g, ph


def _interval_bounds(design: FilterDesign, fa: np.ndarray, fb: np.ndarray):
    """Rigorous bounds of the pole/zero gain over each interval [fa, fb] (Hz).

    Returns ``(g_ub, g_lb, curv)``: upper and lower bounds of 20 log10 |H| (dB) over the
    interval, and a bound of |d^2 (20 log10 |H|) / df^2| (dB/Hz^2) over it.

    Each factor |x - c| (x = e^{j omega} on the unit circle, or j Omega on the imaginary
    axis) lies between the smallest and largest distance from c to that piece of the
    curve (endpoints, or the foot of the perpendicular / the antipode when inside), so
    the sum of the factors' logs is bounded term by term. The second derivative of
    ln|x - c| along the curve is at most |c| / d^2 (digital, per rad^2) or 1 / d^2
    (analog, per (rad/s)^2), d the smallest distance.
    """
    z, p = design.zeros, design.poles
    roots = np.concatenate([z, p])
    nz = z.size
    out_ub = np.full(fa.shape, _DB * math.log(abs(design.gain)))
    out_lb = out_ub.copy()
    curv = np.zeros(fa.shape)
    if not roots.size:
        return out_ub, out_lb, curv
    chunk = max(1, 2_000_000 // roots.size)
    for s in range(0, fa.size, chunk):
        a, b = fa[s:s + chunk, None], fb[s:s + chunk, None]
        if design.digital:
            fs = design.sample_rate_hz
            wa, wb = 2 * np.pi * a / fs, 2 * np.pi * b / fs
            da = np.abs(np.exp(1j * wa) - roots[None, :])
            db = np.abs(np.exp(1j * wb) - roots[None, :])
            r = np.abs(roots)[None, :]
            th = np.angle(roots)[None, :]
            anti = np.where(th > 0, th - np.pi, th + np.pi)
            inside = (th >= wa) & (th <= wb)
            dmin = np.where(inside, np.abs(1.0 - r), np.minimum(da, db))
            dmax = np.where((anti >= wa) & (anti <= wb), 1.0 + r, np.maximum(da, db))
            k2 = r * (2 * np.pi / fs) ** 2
        else:
            wa, wb = 2 * np.pi * a, 2 * np.pi * b
            x, y = roots.real[None, :], roots.imag[None, :]
            da = np.hypot(x, y - wa)
            db = np.hypot(x, y - wb)
            inside = (y >= wa) & (y <= wb)
            dmin = np.where(inside, np.abs(x), np.minimum(da, db))
            dmax = np.maximum(da, db)
            k2 = np.ones_like(x) * (2 * np.pi) ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            lmin, lmax = np.log(dmin), np.log(dmax)
            ub = lmax[:, :nz].sum(1) - lmin[:, nz:].sum(1)
            lb = lmin[:, :nz].sum(1) - lmax[:, nz:].sum(1)
            c = np.where(k2 == 0, 0.0, k2 / dmin ** 2).sum(1)
        out_ub[s:s + chunk] += _DB * ub
        out_lb[s:s + chunk] += _DB * lb
        curv[s:s + chunk] = _DB * c
    return out_ub, out_lb, np.nan_to_num(curv, nan=np.inf)


def _ba_interval_bounds(design: FilterDesign, fa: np.ndarray, fb: np.ndarray):
    """Rigorous bounds of 20 log10 |H| over each interval [fa, fb] (Hz) for a digital
    b/a design, from the coefficients alone (no roots).

    ``P(omega) = |N|^2 = r_0 + 2 sum_k r_k cos(k omega)`` with r the autocorrelation of
    b, so ``|P''| <= 2 sum_k k^2 |r_k|`` =: M everywhere, and over an interval of width w
    (rad) P lies within ``[min(Pa, Pb) - M w^2/8, max(Pa, Pb) + M w^2/8]`` (linear
    interpolation error). The same holds for ``Q = |D|^2``; then
    ``|H|^2 = P / Q`` is bounded by ``P_ub / Q_lb`` and ``P_lb / Q_ub``.
    Returns ``(g_ub, g_lb)`` in dB.
    """
    fs = design.sample_rate_hz
    w = 2 * np.pi * (fb - fa) / fs

    def bounds(c):
        c = np.asarray(c, float)
        r = np.correlate(c, c, "full")[c.size - 1:]
        k = np.arange(r.size)
        m = 2.0 * float(np.sum(k * k * np.abs(r)))
        pa = np.abs(_poly_z(c, fa, fs)) ** 2
        pb = np.abs(_poly_z(c, fb, fs)) ** 2
        quad = m * w * w / 8.0
        return np.maximum(pa, pb) + quad, np.maximum(np.minimum(pa, pb) - quad, 0.0)

    p_ub, p_lb = bounds(design.b)
    q_ub, q_lb = bounds(design.a)
    with np.errstate(divide="ignore", invalid="ignore"):
        g_ub = np.where(q_lb > 0, 10 * np.log10(p_ub) - 10 * np.log10(q_lb), np.inf)
        g_lb = 10 * np.log10(p_lb) - 10 * np.log10(q_ub)
    return g_ub, np.where(np.isnan(g_lb), -np.inf, g_lb)


def _lower_bounds(design, lset: _LimitSet, F, g, g_zpk, g_ref, idx) -> np.ndarray:
    """Lower bound of the set's margin over the intervals [F[i], F[i+1]], i in idx."""
    fa, fb = F[idx], F[idx + 1]
    w = fb - fa
    na, nb = fa + 1e-7 * w, fb - 1e-7 * w          # interior points: the limits inside
    lo_a, hi_a = lset.limits(na)
    lo_b, hi_b = lset.limits(nb)
    ga, gb = g[idx], g[idx + 1]
    ma = margin(ga, lo_a, hi_a)
    mb = margin(gb, lo_b, hi_b)
    # curvature of sloped limit lines (linear in log10 f): |d2L/df2| <= |s| / (ln10 fa^2)
    lcurv = np.zeros(fa.shape)
    with np.errstate(invalid="ignore", divide="ignore"):
        for la, lb in ((lo_a, lo_b), (hi_a, hi_b)):
            ok = np.isfinite(la) & np.isfinite(lb)
            slope = np.where(ok, (lb - la) / (np.log10(nb) - np.log10(na)), 0.0)
            lcurv = np.maximum(lcurv, np.abs(np.nan_to_num(slope)) / (math.log(10) * fa ** 2))
    g_ub, g_lb, curv = _interval_bounds(design, fa, fb)
    ref = 0.0 if g_ref is None else g_ref
    hi_min = np.fmin(hi_a, hi_b)
    lo_max = np.fmax(lo_a, lo_b)

    def box(ub, lb):
        """Interval-arithmetic bound of the margin from gain bounds (limit lines are
        monotone over an interval, so their extremes are at its ends)."""
        with np.errstate(invalid="ignore"):
            up = np.where(np.isfinite(hi_min), hi_min - (ub - ref), np.inf)
            dn = np.where(np.isfinite(lo_max), (lb - ref) - lo_max, np.inf)
            return np.where(np.isnan(up) | np.isnan(dn), -np.inf, np.minimum(up, dn))

    with np.errstate(invalid="ignore", over="ignore"):
        # second-order bound: linear interpolation error <= M w^2 / 8
        interp = np.fmin(ma, mb) - (curv + lcurv) * w ** 2 / 8.0
        interp = np.where(np.isnan(interp), -np.inf, interp)
        lb = np.maximum(interp, box(g_ub, g_lb))
        # allow for the difference between the coefficient response and its pole/zero form
        disc = np.fmax(np.abs(g_zpk[idx] - g[idx]), np.abs(g_zpk[idx + 1] - g[idx + 1]))
        disc = np.where(np.isfinite(disc), disc, 0.0)
        lb = lb - disc
    if design.digital and design.format == "ba":
        # and a bound from the b/a coefficients themselves (no roots, no difference of
        # forms): the better of the two holds
        lb = np.maximum(lb, box(*_ba_interval_bounds(design, fa, fb)))
    return lb


def evaluate_design(design: FilterDesign, mask: Mask, *, points: int = 4000, tol_db: float = 1e-4,
                    max_points: int = 300_000) -> DesignResult:
    """Evaluate a design against a mask so that no narrow notch or ripple peak is missed.

    Method
    ------
    1. Base grid: `points` log-spaced frequencies over the mask's range (from a
       thousandth of the top frequency when the mask starts at 0 Hz), plus
       ``points // 4`` linear ones for a digital design (dense up to Nyquist), plus
       every band edge and limit-line break point (`Mask.edges_hz`), the reference
       frequency, and the critical frequencies of the poles and zeros
       (`FilterDesign.critical_freqs_hz`), where a narrow notch or resonance is centred.
    2. Refinement: for every band (and the transition ceiling) separately, each local
       minimum of the band's margin on the grid is refined by
       ``scipy.optimize.minimize_scalar`` (bounded, between the neighbouring grid
       points) and the minimiser is added to the points - except the local minima
       whose neighbouring intervals are proved (step 3) to hold nothing below the band's
       current worst margin, which cannot matter (this skips, e.g., the thousands of
       rounding-noise minima deep in a stop band).
    3. Certification: for every interval between neighbouring evaluated frequencies
       a rigorous lower bound of the margin inside it is computed from the pole/zero
       form, the larger of
       (a) ``min(margin at the ends) - M w^2 / 8``, the linear-interpolation error
           bound, with M a bound of |d^2 gain / df^2| over the interval
           (sum over roots c of |c| / d_min^2, d_min the smallest distance of c from
           the piece of unit circle / imaginary axis) plus the curvature of a sloped
           limit line; and
       (b) the interval-arithmetic bound: each factor |x - c| lies between its
           smallest and largest distance over the interval, which bounds the gain from
           above and below (this one works right next to a zero on the unit circle).
       A digital ``ba`` design also gets (c), a bound from its coefficients alone
       (`_ba_interval_bounds`: |N|^2 and |D|^2 are trigonometric polynomials with a
       known bound of their second derivative), because numpy.roots of a long FIR
       polynomial can be far off; the largest of the valid bounds counts.
       An interval whose bound lies more than `tol_db` below the current worst margin
       of its band is split in four and steps 2-3 repeat, until every interval is
       certified or `max_points` is reached. An interval whose bound is at least
       ``SAFE_DB`` (1 dB) above both the limit and the overall worst margin needs no
       more: it can neither fail nor be the worst point (a stop band 140 dB down is
       not refined to 1e-4 dB; `DesignResult.loose_db` reports what was proved there).

    Why a notch or peak cannot slip through: the margin inside an interval can only
    dip below the values at its ends by as much as the gain can bend there, and the
    gain can only bend sharply near a pole or zero close to the unit circle (imaginary
    axis) - the bound (a) grows as 1/d_min^2 exactly there - so such an interval is
    split until the dip is either found or proved to be shallower than `tol_db`.
    The grid and the refinement find the worst points quickly; the bound is what makes
    the result a guarantee rather than a sampling (a property test checks it against
    random and pole-clustered frequencies for random biquad cascades). Residual
    assumptions, stated honestly: bounds (a) and (b) are exact for the pole/zero form,
    and the coefficient response (sosfreqz / freqz) is trusted to agree with that form
    between points as it does at the points (their difference at the interval ends is
    subtracted); bound (c) needs no such assumption; floating-point rounding of |H|
    itself (about 1e-13 dB in pass bands, more deep in a stop band) is ignored. If the point
    budget runs out, `DesignResult.certified` is False and `cert_gap_db` says how much
    worse the margin could still be. The phase rules are evaluated on the phase grid
    (base log grid, edges, critical frequencies, refined group-delay maxima) with the
    exact group delay; they are refined but not certified.

    Parameters
    ----------
    design : FilterDesign
    mask : Mask
    points : int
        Log-grid size before refinement (>= 16).
    tol_db : float
        Certification tolerance in dB.
    max_points : int
        Budget of points added by certification.

    Returns
    -------
    DesignResult
    """
    if points < 16:
        raise ValueError("points must be at least 16")
    F, Fp = _base_grid(design, mask, points)
    n_base = F.size
    H = design.response(F)
    href = None
    g_ref = None
    if mask.reference_hz is not None:
        href = complex(design.response([mask.reference_hz])[0])
        with np.errstate(divide="ignore"):
            g_ref = float(20.0 * np.log10(abs(href)))

    def rel(gain):
        return gain if g_ref is None else gain - g_ref

    with np.errstate(divide="ignore", invalid="ignore"):
        G = rel(20.0 * np.log10(np.abs(H)))
    Gz = rel(design._zpk_gain_db(F))
    sets = [_LimitSet(mask, i) for i in range(len(mask.bands))]
    if mask.transition_max_db is not None:
        sets.append(_LimitSet(mask, -1))
    cert = np.zeros(F.size - 1, bool)          # interval certified for every set
    searched: list[list[tuple[float, float]]] = [[] for _ in sets]
    proven = [np.inf for _ in sets]            # smallest bound of intervals proved only "safe"
    n_ref = n_cert = 0
    gap = 0.0
    certified = False
    for _round in range(80):
        bad = np.zeros(F.size - 1, bool)
        gap = 0.0
        todo = np.flatnonzero(~cert)
        new = []
        margins = [ls.margin(F, G) for ls in sets]
        worsts = []
        for m in margins:
            finite = m[~np.isnan(m)]
            worsts.append(float(np.min(finite)) if finite.size else np.inf)
        overall = min(worsts) if worsts else np.inf
        safe_level = max(overall, 0.0) + SAFE_DB
        for si, ls in enumerate(sets):
            m, worst = margins[si], worsts[si]
            if not todo.size:
                continue
            w = F[todo + 1] - F[todo]
            mid_ok = ls.covers(F[todo] + 0.5 * w)
            idx = todo[mid_ok & (w > 1e-12 * F[todo + 1])]
            if not idx.size or worst == -np.inf:
                continue
            lb = _lower_bounds(design, ls, F, G, Gz, g_ref, idx)
            exact = lb >= worst - tol_db
            safe = lb >= safe_level
            short = ~exact & ~safe
            bad[idx[short]] = True
            if np.any(safe & ~exact):
                proven[si] = min(proven[si], float(np.min(lb[safe & ~exact])))
            if np.any(short):
                gap = max(gap, float(worst - np.min(lb[short])))
            # step 2: refine every local minimum next to an interval that might hold a
            # margin below the band's current worst (lb < worst) and is not proved safe
            hot = np.zeros(F.size - 1, bool)
            hot[idx[(lb < worst) & ~safe]] = True
            mm = np.where(np.isnan(m), np.inf, m)
            left = np.concatenate([[np.inf], mm[:-1]])
            right = np.concatenate([mm[1:], [np.inf]])
            locmin = np.flatnonzero(np.isfinite(mm) & (mm <= left) & (mm <= right))
            cand = [i for i in locmin if (i > 0 and hot[i - 1]) or (i < hot.size and hot[i])]
            cand.sort(key=lambda i: mm[i])
            for i in cand[:200]:
                lo_f = F[i - 1] if i > 0 and np.isfinite(mm[i - 1]) else F[i]
                hi_f = F[i + 1] if i + 1 < F.size and np.isfinite(mm[i + 1]) else F[i]
                if hi_f <= lo_f or any(a <= F[i] <= b for a, b in searched[si]):
                    continue
                searched[si].append((lo_f, hi_f))
                x = _refine(design, ls, lo_f, hi_f, rel)
                if x is not None:
                    new.append(x)
                    n_ref += 1
        cert = ~bad
        certified = not bad.any()
        if certified and not new:
            break
        if n_cert >= max_points:
            break
        # step 3: split uncertified intervals in four
        ib = np.flatnonzero(bad)
        a, b = F[ib], F[ib + 1]
        split = np.concatenate([a + (b - a) * t for t in (0.25, 0.5, 0.75)])
        n_cert += split.size
        new = np.concatenate([np.asarray(new, float), split])
        F, G, Gz, H, cert = _merge(design, F, G, Gz, H, cert, new, rel)
    # final evaluation on every point
    gain_mask = dataclasses.replace(mask, phase=PhaseRule())
    res = gain_mask.evaluate(F, H, reference_h=href)
    # phase grid
    Fp, gdp, Hp = _phase_grid(design, mask, Fp)
    phase_res = None
    if mask.phase.active:
        phase_res = mask.evaluate(Fp, Hp, reference_h=href, group_delay_s=gdp).phase
    res.phase = phase_res
    phase_deg = np.degrees(_continuous_phase(design, Fp))
    reasons = _reasons(design, res)
    loose = {}
    for ls, bound in zip(sets, proven):
        br = next(b for b in res.bands if b.index == ls.index)
        if br.n_points and bound < br.worst_margin_db - tol_db:
            loose[ls.index] = bound
    return DesignResult(design, mask, F, H, res.gain_db, res, Fp, phase_deg, gdp, g_ref, certified,
                        gap, tol_db, n_base, n_ref, n_cert, reasons, loose)


def _refine(design, ls: _LimitSet, lo_f: float, hi_f: float, rel) -> float | None:
    """minimize_scalar (bounded) of the set's margin on [lo_f, hi_f]; the pole/zero
    gain is used as the objective because it is ~10x cheaper per call than sosfreqz;
    the minimiser is then evaluated with the coefficient response like every point."""
    def obj(x):
        g = rel(design._log_gain_db(np.array([x])))
        m = ls.margin(np.array([x]), g)[0]
        return 1e300 if np.isnan(m) else (-1e300 if m == -np.inf else float(m))

    width = hi_f - lo_f
    try:
        r = optimize.minimize_scalar(obj, bounds=(lo_f, hi_f), method="bounded",
                                     options={"xatol": max(width * 1e-9, 1e-12 * hi_f)})
    except (ValueError, FloatingPointError):
        return None
    x = float(r.x)
    return x if lo_f <= x <= hi_f else None


def _merge(design, F, G, Gz, H, cert, new, rel):
    new = np.unique(np.asarray(new, float))
    new = new[~np.isin(new, F)]
    if not new.size:
        return F, G, Gz, H, cert
    hn = design.response(new)
    with np.errstate(divide="ignore", invalid="ignore"):
        gn = rel(20.0 * np.log10(np.abs(hn)))
    gzn = rel(design._zpk_gain_db(new))
    allf = np.concatenate([F, new])
    order = np.argsort(allf, kind="stable")
    F2 = allf[order]
    G2 = np.concatenate([G, gn])[order]
    Gz2 = np.concatenate([Gz, gzn])[order]
    H2 = np.concatenate([H, hn])[order]
    # each new interval inherits its parent's certification
    parent = np.searchsorted(F, 0.5 * (F2[:-1] + F2[1:]), side="right") - 1
    cert2 = cert[np.clip(parent, 0, cert.size - 1)]
    return F2, G2, Gz2, H2, cert2


def _phase_grid(design, mask: Mask, Fp):
    """Phase grid: base log grid + edges + critical frequencies, densified so that the
    phase moves less than 45 deg between neighbours (reliable unwrapping), plus refined
    group-delay maxima in the pass bands. Returns (freq_hz, group_delay_s, h)."""
    for _ in range(12):
        gd = design.group_delay_s(Fp)
        dw = 2 * np.pi * np.diff(Fp)
        step = np.maximum(np.abs(gd[:-1]), np.abs(gd[1:])) * dw
        far = np.flatnonzero(step > np.pi / 4)
        if not far.size or Fp.size > 200_000:
            break
        Fp = np.unique(np.concatenate([Fp, 0.5 * (Fp[far] + Fp[far + 1])]))
    gd = design.group_delay_s(Fp)
    if mask.phase.max_group_delay_s is not None:
        inpb = mask.in_pass_band(Fp)
        gm = np.where(inpb, gd, -np.inf)
        left = np.concatenate([[-np.inf], gm[:-1]])
        right = np.concatenate([gm[1:], [-np.inf]])
        peaks = np.flatnonzero(inpb & (gm >= left) & (gm >= right))
        peaks = peaks[np.argsort(-gm[peaks])][:50]
        add = []
        for i in peaks:
            lo = Fp[i - 1] if i > 0 and inpb[i - 1] else Fp[i]
            hi = Fp[i + 1] if i + 1 < Fp.size and inpb[i + 1] else Fp[i]
            if hi <= lo:
                continue
            r = optimize.minimize_scalar(lambda x: -float(design.group_delay_s([x])[0]), bounds=(lo, hi),
                                         method="bounded", options={"xatol": (hi - lo) * 1e-9})
            add.append(float(r.x))
        if add:
            Fp = np.unique(np.concatenate([Fp, add]))
            gd = design.group_delay_s(Fp)
    return Fp, gd, design.response(Fp)


def _continuous_phase(design: FilterDesign, freq_hz) -> np.ndarray:
    """Continuous phase (radians) of the pole/zero form, without unwrapping ambiguity.

    Each factor's phase is written as a principal value that cannot jump: digital, for
    |c| < 1, ``arg(x - c) = omega + arg(1 - c/x)`` with ``|arg(1 - c/x)| < pi/2``, and for
    |c| > 1, ``arg(x - c) = arg(-c) + arg(1 - x/c)``; analog, ``arg(j Omega - c)`` has a
    positive real part for Re c < 0, and ``pi + arg(c - j Omega)`` for Re c > 0. The sum
    is continuous except for the real jumps of pi at zeros exactly on the unit circle
    (imaginary axis).
    """
    f = np.asarray(freq_hz, float)
    x = _curve_point(f, design.sample_rate_hz)
    ph = np.full(f.shape, float(np.angle(design.gain)))
    omega = 2 * np.pi * f / design.sample_rate_hz if design.digital else None

    def arg_factor(c):
        # a root on the unit circle (imaginary axis), up to rounding, is taken as just
        # inside (left of) it: its phase then steps up by pi where x passes it, the limit
        # of a minimum-phase root, so a notch returns to its starting phase
        if design.digital:
            if abs(c) < 1 + 1e-9:
                return omega + np.angle(1 - c / x)
            return np.angle(-c) + np.angle(1 - x / c)
        if c.real > 1e-9 * abs(c):
            return np.pi + np.angle(c - x)
        return np.angle(x - c)

    with np.errstate(divide="ignore", invalid="ignore"):
        for c in design.zeros:
            ph = ph + arg_factor(c)
        for c in design.poles:
            ph = ph - arg_factor(c)
    if ph.size and np.isfinite(ph[0]):
        # each factor's formula fixes its phase only up to 2 pi; like the mask's phase
        # rules, start in (-pi, pi] at the lowest frequency
        ph = ph - 2 * np.pi * np.ceil((ph[0] - np.pi) / (2 * np.pi))
    return ph


def _reasons(design: FilterDesign, res: MaskResult) -> list[str]:
    out = []
    for w in design.warnings:
        if w.startswith("not stable"):
            out.append(f"design is {w}")
    for b in res.bands:
        if b.n_points and not b.passed:
            where = "transition ceiling" if b.index < 0 else f"band {b.index} ({b.kind})"
            out.append(f"{where}: worst margin {b.worst_margin_db:+.4g} dB at {b.worst_freq_hz:.6g} Hz")
    if res.phase is not None and not res.phase.passed:
        out.append("phase rule not met")
    return out


# ======================================================================================
# the command
# ======================================================================================
def run_design_check(profile_path, coeffs_path, *, quantize: str | None = None, plot_path=None,
                     out=None, points: int = 4000) -> int:
    """``harness design-check``: score a coefficient file against a profile's mask.

    Prints the profile, the design, a per-band table (worst margin, where, gain there,
    pass/FAIL), the transition ceiling and phase rule when present, and the verdict;
    with `quantize` the same for the fixed-point design side by side, with the margin
    quantisation costs. Writes a Bode plot (default ``<coeffs stem>.design.png`` next to
    the coefficient file). Returns the exit code: 0 pass, 1 fail (with `quantize`, the
    float and the quantised design must both pass). Configuration problems raise
    ConfigError (exit 2).
    """
    from harness.profile import load_profile

    out = sys.stdout if out is None else out
    if isinstance(points, bool) or not isinstance(points, int) or not 16 <= points <= 1_000_000:
        raise ConfigError(None, "--points", f"must be a whole number from 16 to 1000000, got {points!r}")
    qf = parse_qformat(quantize) if quantize is not None else None
    profile = load_profile(profile_path)
    mask = profile.mask
    design = load_coefficients(coeffs_path, default_sample_rate_hz=profile.sample_rate_hz if profile.digital else None)
    check_compatible(design, mask, profile_id=profile.id, profile_path=profile_path,
                     digital_profile=profile.digital)
    qdesign = qrep = None
    if qf is not None:
        qdesign, qrep = quantize_design(design, qf)
    plot = Path(plot_path) if plot_path else Path(coeffs_path).with_name(Path(coeffs_path).stem + ".design.png")

    res = evaluate_design(design, mask, points=points)
    qres = evaluate_design(qdesign, mask, points=points) if qdesign is not None else None

    w = out.write
    w(f"profile  {profile.id} rev {profile.revision or '-'}: {profile.title}\n")
    w(f"         {profile.domain}" + (f", sample rate {profile.sample_rate_hz:g} Hz" if profile.sample_rate_hz else "")
      + (f"; gains relative to {mask.reference_hz:g} Hz" if mask.reference_hz else "; absolute gains") + "\n")
    name = design.id or Path(coeffs_path).stem
    w(f"design   {name}" + (f": {design.title}" if design.title else "") + "\n")
    w(f"         {design.describe()}  [{coeffs_path}]\n")
    for n in design.notes:
        w(f"         note: {n}\n")
    for wn in design.warnings:
        w(f"warning: {wn}\n")
    if res.reference_gain_db is not None:
        w(f"         gain at the reference {mask.reference_hz:g} Hz: {res.reference_gain_db:+.4f} dB\n")
    w(f"grid     {res.freq_hz.size} frequencies ({res.n_base} base incl. edges and pole/zero frequencies, "
      f"{res.n_refined} refined, {res.n_certify} added by certification)\n")
    if res.certified:
        w(f"         worst margins proved exact to {res.tol_db:g} dB between all evaluated frequencies"
          + (" (* see below)" if res.loose_db else "") + "\n")
    else:
        w(f"warning: certification budget reached: a margin up to {res.cert_gap_db:.3g} dB worse than "
          "reported may hide between evaluated frequencies\n")
    if qrep is not None:
        q = qrep.qformat
        w(f"quantise {q.spec}: {q.word_bits}-bit words, range [{q.min_value:g}, {q.max_value:.8g}], "
          f"LSB 2^-{q.frac_bits} = {q.lsb:.3g}\n")
        w(f"         {qrep.sos_q.shape[0]} sections; largest coefficient error {qrep.max_abs_error:.3g} "
          f"(<= LSB/2), largest pole shift {qrep.max_pole_shift:.3g}"
          + ("" if qrep.stable else "; the QUANTISED DESIGN IS NOT STABLE") + "\n")
        if qrep.normalised:
            w("         sections were divided by a0 first (a0 = 1 is implicit in hardware)\n")
    w("\n")
    w(_band_table(res, qres, qrep))
    w("\n")
    for label, r in (("", res), (f"{qrep.qformat.spec}: " if qrep else "", qres)):
        if r is not None and r.phase is not None:
            w(_phase_line(mask, r.phase, label))
    ok = res.passed and (qres is None or qres.passed)
    if qres is None:
        w(f"verdict  {'PASS' if ok else 'FAIL'}\n")
    else:
        w(f"verdict  {'PASS' if ok else 'FAIL'}  (float design {'pass' if res.passed else 'FAIL'}, "
          f"{qrep.qformat.spec} design {'pass' if qres.passed else 'FAIL'})\n")
    for r, label in ((res, ""), (qres, f"{qrep.qformat.spec}: " if qrep else "")):
        if r is not None:
            for reason in r.reasons:
                w(f"         {label}{reason}\n")

    from harness.plot import Trace, bode_plot

    extra = []
    if qres is not None:
        extra.append(Trace(qres.freq_hz, qres.gain_db, label=f"quantised {qrep.qformat.spec}",
                           phase_deg=np.degrees(_continuous_phase(qdesign, qres.freq_hz)),
                           group_delay_s=qdesign.group_delay_s(qres.freq_hz)))
    title = f"{name}: design check against {profile.id} rev {profile.revision or '-'}: {'PASS' if ok else 'FAIL'}"
    try:
        bode_plot(mask, res.freq_hz, res.gain_db, phase_deg=res.phase_deg, group_delay_s=res.group_delay_s,
                  phase_freq_hz=res.phase_freq_hz, title=title, path=plot, extra=extra, style="curve",
                  subtitle=design.describe())
    except OSError as exc:
        raise ConfigError(str(plot), None, f"cannot write the plot ({exc.strerror or exc})") from None
    w(f"plot     {plot}\n")
    return 0 if ok else 1


def _fm(m: float, width: int) -> str:
    """A margin in dB: 4 decimals, or scientific when it would show as +-0.0000."""
    if m != 0 and abs(m) < 5e-5:
        return f"{m:>+{width}.1e}"
    return f"{m:>+{width}.4f}"


def _fmt_range(b: BandResult) -> str:
    if b.index < 0:
        return "between bands"
    return f"{b.start_hz:.6g} .. {b.stop_hz:.6g}"


def _band_table(res: DesignResult, qres: DesignResult | None, qrep: QuantReport | None) -> str:
    mask = res.mask
    lines = []
    if qres is None:
        lines.append(f"  {'band':>4}  {'kind':<10} {'range Hz':<22} {'limits dB':<18} {'worst margin dB':>15} "
                     f"{'at Hz':>12} {'gain dB':>10}  result")
    else:
        q = qrep.qformat.spec
        lines.append(f"  {'band':>4}  {'kind':<10} {'range Hz':<22} {'limits dB':<18} {'float margin':>13} "
                     f"{'at Hz':>12} {q + ' margin':>13} {'at Hz':>12} {'cost dB':>9}  result")
    for i, b in enumerate(res.bands):
        lim = _limits_text(mask, b)
        kind = "transition" if b.index < 0 else b.kind
        if b.n_points == 0:
            row = f"  {_idx(b):>4}  {kind:<10} {_fmt_range(b):<22} {lim:<18} {'(no points)':>15}"
            lines.append(row)
            continue
        star = "*" if b.index in res.loose_db or (qres is not None and b.index in qres.loose_db) else " "
        if qres is None:
            lines.append(f"  {_idx(b):>4}  {kind:<10} {_fmt_range(b):<22} {lim:<18} {_fm(b.worst_margin_db, 15)}{star}"
                         f"{b.worst_freq_hz:>12.6g} {b.worst_gain_db:>+10.4f}  {'pass' if b.passed else 'FAIL'}")
        else:
            qb = qres.bands[i]
            cost = b.worst_margin_db - qb.worst_margin_db
            verdict = ("pass" if b.passed else "FAIL") + "/" + ("pass" if qb.passed else "FAIL")
            lines.append(f"  {_idx(b):>4}  {kind:<10} {_fmt_range(b):<22} {lim:<18} {_fm(b.worst_margin_db, 13)}{star}"
                         f"{b.worst_freq_hz:>12.6g} {_fm(qb.worst_margin_db, 13)} {qb.worst_freq_hz:>12.6g} "
                         f"{_fm(cost, 9)}  {verdict}")
    if qres is not None:
        lines.append(f"  (cost = float margin - quantised margin; result float/{qrep.qformat.spec})")
    for r, label in ((res, ""), (qres, "quantised: ")):
        for idx, bound in sorted(r.loose_db.items()) if r is not None else ():
            where = "transition ceiling" if idx < 0 else f"band {idx}"
            lines.append(f"  * {label}{where}: far from its limit; its margin is proved to be at least "
                         f"{bound:+.2f} dB, not refined to {r.tol_db:g} dB")
    return "\n".join(lines) + "\n"


def _idx(b: BandResult) -> str:
    return "-" if b.index < 0 else str(b.index)


def _limits_text(mask: Mask, b: BandResult) -> str:
    if b.index < 0:
        return f"<= {mask.transition_max_db:+.2f}"
    band = mask.bands[b.index]
    if band.kind == "pass":
        return f"{band.min_db:+.3g} .. {band.max_db:+.3g}"
    if band.kind == "stop":
        return f"<= {band.max_db:+.3g}"
    sides = [n for n, ln in (("lower", band.lower), ("upper", band.upper)) if ln is not None]
    return "lines: " + "+".join(sides)


def _phase_line(mask: Mask, ph: PhaseResult, label: str) -> str:
    rule = mask.phase
    parts = []
    if rule.rule in ("linear", "zero") and ph.deviation_deg.size:
        j = int(np.nanargmax(np.abs(ph.deviation_deg)))
        parts.append(f"worst deviation {abs(ph.deviation_deg[j]):.4g} deg at {ph.freq_hz[j]:.6g} Hz "
                     f"(margin {ph.worst_margin_deg:+.4g} deg)")
        if ph.delay_s is not None:
            parts.append(f"fitted delay {ph.delay_s * 1e3:.6g} ms")
    elif rule.rule == "limits" and ph.margin_deg.size:
        parts.append(f"worst margin {ph.worst_margin_deg:+.4g} deg")
    if ph.group_delay_s is not None and ph.group_delay_s.size:
        gmax = float(np.max(ph.group_delay_s))
        parts.append(f"max group delay {gmax * 1e3:.6g} ms in the pass bands "
                     f"(margin {float(np.min(ph.group_delay_margin_s)) * 1e3:+.4g} ms)")
    verdict = "pass" if ph.passed else "FAIL"
    desc = rule.describe()
    desc = desc[len("none; "):] if desc.startswith("none; ") else desc
    head = f"phase    {desc}: " if not label else f"         {label}"
    return head + "; ".join(parts) + f"  {verdict}\n"
