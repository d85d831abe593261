"""Tolerance masks: pass bands, stop bands, sloped limit lines, transition ceilings and
phase rules, and the evaluation of a complex frequency response against them.

All frequencies are in Hz (conversion from rad/sample or fraction of Nyquist happens
when a profile is loaded, see `harness.units`); all gains are amplitude gains in dB.

Conventions
-----------
* A band covers the closed interval ``[start_hz, stop_hz]``; a point exactly on an edge
  belongs to the band. "Exactly" allows a relative ``EDGE_RTOL`` (1e-9) so that an edge
  converted from rad/sample (60 Hz = 2*pi*60/48000 rad/sample reads back as
  60.00000000000001 Hz) still holds a point measured at 60 Hz.
* Where several bands cover a frequency, every one of their limits applies (the
  tightest wins).
* Frequencies covered by no band are transition bands: no limit, unless the mask has a
  ``transition_max_db`` ceiling, which then applies there.
* Margin is signed, in dB, positive inside the mask:
  ``margin = min(high_db - gain_db, gain_db - low_db)`` over the limits present.
  A frequency with no limit has margin NaN.
* Limit lines are piecewise linear in dB over log10-frequency and apply only between
  their first and last point.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from harness.units import db_from_gain

BAND_KINDS = ("pass", "stop", "limits")
EDGE_RTOL = 1e-9
PHASE_RULES = ("none", "linear", "zero", "limits")


# --------------------------------------------------------------------------------------
# limit lines
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class LimitLine:
    """A piecewise-linear limit in some unit (dB or degrees) over log10-frequency.

    Parameters
    ----------
    freq_hz : tuple of float
        Break-point frequencies in Hz, strictly positive, non-decreasing. Two equal
        frequencies make a step; the later value applies from that frequency on.
    value : tuple of float
        Limit at each break point.
    """

    freq_hz: tuple[float, ...]
    value: tuple[float, ...]

    def __post_init__(self):
        if len(self.freq_hz) != len(self.value) or len(self.freq_hz) < 1:
            raise ValueError("a limit line needs at least one [hz, value] point")
        f = np.asarray(self.freq_hz, dtype=float)
        if np.any(f <= 0):
            raise ValueError("limit line frequencies must be > 0 Hz")
        if np.any(np.diff(f) < 0):
            raise ValueError("limit line frequencies must be in ascending order")

    @property
    def start_hz(self) -> float:
        return float(self.freq_hz[0])

    @property
    def stop_hz(self) -> float:
        return float(self.freq_hz[-1])

    def at(self, freq_hz) -> np.ndarray:
        """Limit at `freq_hz`; NaN outside ``[start_hz, stop_hz]``."""
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        out = np.full(f.shape, np.nan)
        xs = np.log10(np.asarray(self.freq_hz, dtype=float))
        ys = np.asarray(self.value, dtype=float)
        inside = (f >= self.freq_hz[0]) & (f <= self.freq_hz[-1]) & (f > 0)
        if len(xs) == 1:
            out[inside] = ys[0]
            return out
        x = np.log10(f[inside])
        # np.interp with repeated x takes the right-hand value for x past the step,
        # which is the documented behaviour (the later value applies from there on).
        idx = np.searchsorted(xs, x, side="right") - 1
        idx = np.clip(idx, 0, len(xs) - 2)
        x0, x1 = xs[idx], xs[idx + 1]
        y0, y1 = ys[idx], ys[idx + 1]
        span = x1 - x0
        with np.errstate(invalid="ignore", divide="ignore"):
            t = np.where(span > 0, (x - x0) / np.where(span > 0, span, 1.0), 1.0)
        val = y0 + t * (y1 - y0)
        # exactly at the last point of a step use the later value
        val = np.where(x >= xs[-1], ys[-1], val)
        out[inside] = val
        return out


# --------------------------------------------------------------------------------------
# bands
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Band:
    """One band of a tolerance mask.

    kind ``pass``: ``min_db <= gain <= max_db``; ``stop``: ``gain <= max_db``;
    ``limits``: ``lower(f) <= gain <= upper(f)`` from limit lines (either may be absent).
    """

    kind: str
    start_hz: float
    stop_hz: float
    min_db: float | None = None
    max_db: float | None = None
    upper: LimitLine | None = None
    lower: LimitLine | None = None
    label: str = ""

    def __post_init__(self):
        if self.kind not in BAND_KINDS:
            raise ValueError(f"unknown band kind {self.kind!r}")
        if not (0.0 <= self.start_hz < self.stop_hz):
            raise ValueError("band needs 0 <= start_hz < stop_hz")

    def covers(self, freq_hz) -> np.ndarray:
        f = np.asarray(freq_hz, dtype=float)
        return (f >= self.start_hz * (1 - EDGE_RTOL)) & (f <= self.stop_hz * (1 + EDGE_RTOL))

    def limits_at(self, freq_hz) -> tuple[np.ndarray, np.ndarray]:
        """(low_db, high_db) this band imposes at `freq_hz`; -inf / +inf where it
        imposes nothing (outside the band, or no such side)."""
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        inside = self.covers(f)
        low = np.full(f.shape, -np.inf)
        high = np.full(f.shape, np.inf)
        if self.kind == "limits":
            if self.lower is not None:
                lo = self.lower.at(f)
                ok = inside & np.isfinite(lo)
                low[ok] = lo[ok]
            if self.upper is not None:
                hi = self.upper.at(f)
                ok = inside & np.isfinite(hi)
                high[ok] = hi[ok]
        else:
            if self.min_db is not None:
                low[inside] = self.min_db
            if self.max_db is not None:
                high[inside] = self.max_db
        return low, high

    def describe(self) -> str:
        if self.kind == "pass":
            return f"pass {self.min_db:+.3f} .. {self.max_db:+.3f} dB"
        if self.kind == "stop":
            return f"stop <= {self.max_db:+.2f} dB"
        parts = []
        if self.lower is not None:
            parts.append(f"lower line ({len(self.lower.freq_hz)} pts)")
        if self.upper is not None:
            parts.append(f"upper line ({len(self.upper.freq_hz)} pts)")
        return "limits: " + ", ".join(parts)


# --------------------------------------------------------------------------------------
# phase rules
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PhaseRule:
    """Phase requirement.

    rule ``none``: no phase requirement.
    rule ``linear``: over the pass bands, the unwrapped phase may deviate from its
    least-squares straight line (phase = offset - 360 * f * delay, one common delay,
    one offset per pass band) by at most ``max_deviation_deg``.
    rule ``zero``: over the pass bands, the phase may deviate from 0 deg by at most
    ``max_deviation_deg`` (offline, non-causal filtering).
    rule ``limits``: the phase (unwrapped from the lowest frequency, first value in
    (-180, 180]) lies between ``lower`` and ``upper`` lines (degrees over log-frequency).
    ``max_group_delay_s``, with any rule, bounds the group delay over the pass bands.
    """

    rule: str = "none"
    max_deviation_deg: float | None = None
    max_group_delay_s: float | None = None
    upper: LimitLine | None = None
    lower: LimitLine | None = None

    def __post_init__(self):
        if self.rule not in PHASE_RULES:
            raise ValueError(f"unknown phase rule {self.rule!r}")

    @property
    def active(self) -> bool:
        return self.rule != "none" or self.max_group_delay_s is not None

    def describe(self) -> str:
        parts = []
        if self.rule == "none":
            parts.append("none")
        elif self.rule == "linear":
            parts.append(f"linear within {self.max_deviation_deg:g} deg over the pass bands")
        elif self.rule == "zero":
            parts.append(f"zero phase within {self.max_deviation_deg:g} deg over the pass bands")
        else:
            parts.append("phase limit lines")
        if self.max_group_delay_s is not None:
            parts.append(f"group delay <= {self.max_group_delay_s * 1e3:g} ms")
        return "; ".join(parts)


# --------------------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------------------
@dataclass
class BandResult:
    """Worst point of one band (or the transition ceiling, index -1)."""

    index: int
    kind: str
    label: str
    start_hz: float
    stop_hz: float
    n_points: int
    worst_margin_db: float
    worst_freq_hz: float
    worst_gain_db: float

    @property
    def passed(self) -> bool:
        return self.n_points == 0 or self.worst_margin_db >= 0.0


@dataclass
class PhaseResult:
    """Evaluation of a phase rule over the points it applies to."""

    rule: str
    freq_hz: np.ndarray
    phase_deg: np.ndarray          # phase used by the rule (unwrapped where needed)
    deviation_deg: np.ndarray      # what is compared with the limit
    limit_deg: np.ndarray          # allowed |deviation| (linear/zero) or NaN
    margin_deg: np.ndarray         # signed, positive inside
    delay_s: float | None          # fitted delay of the linear rule
    group_delay_s: np.ndarray | None
    group_delay_margin_s: np.ndarray | None

    @property
    def passed(self) -> bool:
        ok = True
        if self.margin_deg.size:
            # NaN counts only where no limit applies (limit lines with a gap); an
            # undefined phase under a deviation limit (finite limit_deg) fails
            limited = ~np.isnan(self.margin_deg) | np.isfinite(self.limit_deg)
            ok = ok and bool(np.all(self.margin_deg[limited] >= 0))
        if self.group_delay_margin_s is not None and self.group_delay_margin_s.size:
            ok = ok and bool(np.all(self.group_delay_margin_s >= 0))
        return ok

    @property
    def worst_margin_deg(self) -> float:
        m = self.margin_deg[~np.isnan(self.margin_deg)]
        return float(np.min(m)) if m.size else float("nan")


@dataclass
class MaskResult:
    """Evaluation of a response against a mask, point by point and per band."""

    freq_hz: np.ndarray
    gain_db: np.ndarray            # as compared (relative to the reference when set)
    low_db: np.ndarray             # -inf where no lower limit
    high_db: np.ndarray            # +inf where no upper limit
    margin_db: np.ndarray          # NaN where no limit
    bands: list[BandResult]
    reference_gain_db: float | None
    phase: PhaseResult | None = None

    @property
    def gain_passed(self) -> bool:
        # NaN means "no limit here"; -inf (zero gain under a lower limit) must fail
        m = self.margin_db[~np.isnan(self.margin_db)]
        return bool(np.all(m >= 0.0))

    @property
    def passed(self) -> bool:
        return self.gain_passed and (self.phase is None or self.phase.passed)

    @property
    def worst_index(self) -> int | None:
        m = np.where(np.isnan(self.margin_db), np.inf, self.margin_db)
        if np.all(np.isnan(self.margin_db)):
            return None
        return int(np.argmin(m))

    @property
    def worst_margin_db(self) -> float:
        i = self.worst_index
        return float("nan") if i is None else float(self.margin_db[i])


# --------------------------------------------------------------------------------------
# the mask
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Mask:
    """A frequency-response tolerance mask.

    Parameters
    ----------
    bands : tuple of Band
    reference_hz : float or None
        When set, gains are compared relative to the gain at this frequency.
    sample_rate_hz : float or None
        Sample rate of a digital specification (for rad/sample display and the
        Nyquist check); None for an analog specification.
    transition_max_db : float or None
        Ceiling that applies wherever no band applies.
    phase : PhaseRule
    """

    bands: tuple[Band, ...]
    reference_hz: float | None = None
    sample_rate_hz: float | None = None
    transition_max_db: float | None = None
    phase: PhaseRule = field(default_factory=PhaseRule)

    # -- geometry ---------------------------------------------------------------
    @property
    def f_min_hz(self) -> float:
        return min(b.start_hz for b in self.bands)

    @property
    def f_max_hz(self) -> float:
        return max(b.stop_hz for b in self.bands)

    def edges_hz(self) -> np.ndarray:
        """Every band edge and limit-line break point, sorted, unique, > 0."""
        pts = []
        for b in self.bands:
            pts += [b.start_hz, b.stop_hz]
            for line in (b.upper, b.lower):
                if line is not None:
                    pts += list(line.freq_hz)
        for line in (self.phase.upper, self.phase.lower):
            if line is not None:
                pts += list(line.freq_hz)
        if self.reference_hz:
            pts.append(self.reference_hz)
        a = np.unique(np.asarray(pts, dtype=float))
        return a[a > 0]

    def pass_bands(self) -> list[Band]:
        return [b for b in self.bands if b.kind == "pass"]

    def in_pass_band(self, freq_hz) -> np.ndarray:
        f = np.asarray(freq_hz, dtype=float)
        out = np.zeros(f.shape, dtype=bool)
        for b in self.pass_bands():
            out |= b.covers(f)
        return out

    def limits(self, freq_hz) -> tuple[np.ndarray, np.ndarray]:
        """(low_db, high_db) at each frequency: the tightest over all bands covering it,
        the transition ceiling where no band covers it; -inf / +inf where none."""
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        low = np.full(f.shape, -np.inf)
        high = np.full(f.shape, np.inf)
        covered = np.zeros(f.shape, dtype=bool)
        for b in self.bands:
            lo, hi = b.limits_at(f)
            low = np.maximum(low, lo)
            high = np.minimum(high, hi)
            covered |= b.covers(f)
        if self.transition_max_db is not None:
            high = np.where(covered, high, np.minimum(high, self.transition_max_db))
        return low, high

    # -- evaluation -------------------------------------------------------------
    def reference_gain_db(self, freq_hz, h) -> float | None:
        """Gain in dB at the reference frequency, from the given points (linear
        interpolation in dB over log-frequency when the reference is not a point)."""
        if self.reference_hz is None:
            return None
        f = np.asarray(freq_hz, dtype=float)
        g = db_from_gain(np.abs(np.asarray(h)))
        hit = np.flatnonzero(np.isclose(f, self.reference_hz, rtol=1e-9, atol=0))
        if hit.size:
            return float(g[hit[0]])
        order = np.argsort(f)
        fs, gs = f[order], g[order]
        if not (fs[0] <= self.reference_hz <= fs[-1]):
            raise ValueError(f"reference frequency {self.reference_hz:g} Hz lies outside the evaluated points")
        return float(np.interp(np.log10(self.reference_hz), np.log10(fs), gs))

    def evaluate(self, freq_hz, h, *, reference_h: complex | None = None,
                 group_delay_s=None) -> MaskResult:
        """Evaluate a complex response against the mask.

        Parameters
        ----------
        freq_hz : array_like, shape (n,)
            Frequencies in Hz, ascending.
        h : array_like of complex, shape (n,)
            Complex response at `freq_hz` (phase in radians via ``np.angle``).
        reference_h : complex, optional
            Response at ``reference_hz``; if omitted and the mask is relative, it is
            taken from (or interpolated between) the given points.
        group_delay_s : array_like, optional
            Group delay at `freq_hz`, if known exactly; otherwise the phase rule
            estimates it by finite differences of the unwrapped phase.

        Returns
        -------
        MaskResult
        """
        f = np.asarray(freq_hz, dtype=float)
        h = np.asarray(h, dtype=complex)
        if f.shape != h.shape or f.ndim != 1:
            raise ValueError("freq_hz and h must be 1-D arrays of the same length")
        with np.errstate(divide="ignore"):
            gain_db = db_from_gain(np.abs(h))
        ref_db = None
        if self.reference_hz is not None:
            if reference_h is not None:
                with np.errstate(divide="ignore"):
                    ref_db = float(db_from_gain(abs(reference_h)))
            else:
                with np.errstate(divide="ignore"):
                    ref_db = self.reference_gain_db(f, h)
            with np.errstate(invalid="ignore"):  # -inf - -inf (dead reference) -> NaN
                gain_db = gain_db - ref_db
        low, high = self.limits(f)
        margin_db = margin(gain_db, low, high)
        bands = self._band_results(f, gain_db)
        phase = None
        if self.phase.active:
            phase = evaluate_phase(self, f, h, group_delay_s=group_delay_s)
        return MaskResult(f, gain_db, low, high, margin_db, bands, ref_db, phase)

    def _band_results(self, f: np.ndarray, gain_db: np.ndarray) -> list[BandResult]:
        out = []
        covered = np.zeros(f.shape, dtype=bool)
        for i, b in enumerate(self.bands):
            lo, hi = b.limits_at(f)
            inside = b.covers(f)
            covered |= inside
            m = margin(gain_db, lo, hi)
            out.append(_worst(i, b.kind, b.label or f"band[{i}]", b.start_hz, b.stop_hz,
                              f, gain_db, np.where(inside, m, np.nan)))
        if self.transition_max_db is not None:
            hi = np.where(covered, np.inf, self.transition_max_db)
            m = margin(gain_db, np.full(f.shape, -np.inf), hi)
            lo_f = float(f[~covered][0]) if np.any(~covered) else float("nan")
            hi_f = float(f[~covered][-1]) if np.any(~covered) else float("nan")
            out.append(_worst(-1, "transition", "transition ceiling", lo_f, hi_f, f, gain_db, m))
        return out


def margin(gain_db, low_db, high_db) -> np.ndarray:
    """Signed margin in dB, positive inside ``[low_db, high_db]``; NaN with no limit.

    ``margin = min(high_db - gain_db, gain_db - low_db)``, where an infinite limit
    contributes nothing. An undefined gain (NaN) under a limit gets margin -inf: it
    can never count as inside.
    """
    g = np.asarray(gain_db, dtype=float)
    lo = np.asarray(low_db, dtype=float)
    hi = np.asarray(high_db, dtype=float)
    with np.errstate(invalid="ignore"):
        up = np.where(np.isfinite(hi), hi - g, np.inf)
        dn = np.where(np.isfinite(lo), g - lo, np.inf)
    m = np.minimum(up, dn)
    none = ~np.isfinite(lo) & ~np.isfinite(hi)
    m = np.where(np.isnan(g), -np.inf, m)
    return np.where(none, np.nan, m)


def _worst(index, kind, label, start, stop, f, gain_db, m) -> BandResult:
    ok = ~np.isnan(m)
    n = int(np.count_nonzero(ok))
    if n == 0:
        return BandResult(index, kind, label, start, stop, 0, float("nan"), float("nan"), float("nan"))
    j = int(np.nanargmin(m))
    return BandResult(index, kind, label, float(start), float(stop), n, float(m[j]), float(f[j]), float(gain_db[j]))


# --------------------------------------------------------------------------------------
# phase
# --------------------------------------------------------------------------------------
def fit_linear_phase(freq_hz, phase_rad, segment) -> tuple[np.ndarray, float]:
    """Least-squares straight phase line with one common delay and one offset per segment.

    Model: ``phase_rad[i] = offset[segment[i]] - 2*pi*freq_hz[i]*delay_s``.
    Returns ``(fitted_phase_rad, delay_s)``. Written by hand (a small lstsq) because
    the per-segment offsets are specific to masks with several pass bands.
    """
    f = np.asarray(freq_hz, dtype=float)
    p = np.asarray(phase_rad, dtype=float)
    seg = np.asarray(segment)
    labels = np.unique(seg)
    cols = [-2.0 * np.pi * f]
    for s in labels:
        cols.append((seg == s).astype(float))
    a = np.column_stack(cols)
    coef, *_ = np.linalg.lstsq(a, p, rcond=None)
    return a @ coef, float(coef[0])


def group_delay_fd(freq_hz, phase_rad) -> np.ndarray:
    """Group delay ``-d(phase)/d(omega)`` in seconds by finite differences of an
    unwrapped phase (central differences inside, one-sided at the ends)."""
    f = np.asarray(freq_hz, dtype=float)
    p = np.asarray(phase_rad, dtype=float)
    if f.size < 2:
        return np.full(f.shape, np.nan)
    return -np.gradient(p, 2.0 * np.pi * f)


def evaluate_phase(mask: Mask, freq_hz, h, *, group_delay_s=None) -> PhaseResult:
    """Evaluate the mask's phase rule (see `PhaseRule`) on a complex response."""
    rule = mask.phase
    f = np.asarray(freq_hz, dtype=float)
    h = np.asarray(h, dtype=complex)
    gd_all = None if group_delay_s is None else np.asarray(group_delay_s, dtype=float)

    if rule.rule == "limits":
        sel = np.ones(f.shape, dtype=bool)
        if rule.upper is not None or rule.lower is not None:
            lines = [ln for ln in (rule.upper, rule.lower) if ln is not None]
            lo_f = min(ln.start_hz for ln in lines)
            hi_f = max(ln.stop_hz for ln in lines)
            sel = (f >= lo_f) & (f <= hi_f)
    else:
        sel = mask.in_pass_band(f)
    fs = f[sel]
    hs = h[sel]
    # segment label per point: which pass band (contiguous run) it belongs to
    seg = np.zeros(fs.shape, dtype=int)
    if rule.rule != "limits":
        for k, b in enumerate(mask.pass_bands()):
            seg[b.covers(fs)] = k
    phase_rad = _unwrap_segments(np.angle(hs), seg)

    delay = None
    if rule.rule == "linear" and fs.size >= 2:
        fitted, delay = fit_linear_phase(fs, phase_rad, seg)
        dev = np.degrees(phase_rad - fitted)
        lim = np.full(fs.shape, float(rule.max_deviation_deg))
        marg = lim - np.abs(dev)
    elif rule.rule == "zero":
        dev = np.degrees(np.angle(hs))
        lim = np.full(fs.shape, float(rule.max_deviation_deg))
        marg = lim - np.abs(dev)
    elif rule.rule == "limits":
        dev = np.degrees(phase_rad)
        hi = rule.upper.at(fs) if rule.upper is not None else np.full(fs.shape, np.nan)
        lo = rule.lower.at(fs) if rule.lower is not None else np.full(fs.shape, np.nan)
        lim = np.full(fs.shape, np.nan)
        marg = margin(dev, np.where(np.isnan(lo), -np.inf, lo), np.where(np.isnan(hi), np.inf, hi))
    else:
        dev = np.zeros(fs.shape)
        lim = np.full(fs.shape, np.nan)
        marg = np.full(fs.shape, np.nan)

    gd = gd_m = None
    if rule.max_group_delay_s is not None:
        sel_pb = mask.in_pass_band(f)
        if gd_all is not None:
            gd = gd_all[sel_pb]
        else:
            fp = f[sel_pb]
            segp = np.zeros(fp.shape, dtype=int)
            for k, b in enumerate(mask.pass_bands()):
                segp[b.covers(fp)] = k
            pp = _unwrap_segments(np.angle(h[sel_pb]), segp)
            gd = np.empty(fp.shape)
            for s in np.unique(segp):
                m = segp == s
                gd[m] = group_delay_fd(fp[m], pp[m])
        gd_m = rule.max_group_delay_s - gd
    return PhaseResult(rule.rule, fs, np.degrees(phase_rad), dev, lim, marg, delay, gd, gd_m)


def _unwrap_segments(phase_rad: np.ndarray, seg: np.ndarray) -> np.ndarray:
    out = np.array(phase_rad, dtype=float)
    for s in np.unique(seg):
        m = seg == s
        out[m] = np.unwrap(out[m])
    if out.size:
        # first value in (-pi, pi]
        out -= 2 * np.pi * np.round((out[0] - np.angle(np.exp(1j * out[0]))) / (2 * np.pi))
    return out
