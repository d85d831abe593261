"""Bode plots over a tolerance mask (PNG, matplotlib Agg, no display needed).

`bode_plot` draws the magnitude in dB over log frequency on top of the mask - allowed
windows shaded light green, forbidden regions hatched red above ceilings and below
floors, transition bands left clear, band edges marked - with the worst point
annotated; a pass-band detail panel when the pass-band window is small next to the
full range; and the phase (or the group delay, when the profile limits it) beneath on
a shared frequency axis. It takes either a dense curve (design check) or measured
points with their expanded uncertainty (certificates), plus extra traces (e.g. the
quantised design).

Files are written atomically: to a temporary file in the same folder, then
``os.replace``.
"""

from __future__ import annotations

import io
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import EngFormatter, LogLocator, NullFormatter

from harness.mask import Mask, margin

# print-friendly palette (distinct in grey scale too)
C_CURVE = "#1b3a6b"
C_EXTRA = ("#d9641e", "#6a3d9a", "#1b7837")
C_OK_FILL = "#d8efd8"
C_OK_EDGE = "#2e7d32"
C_BAD = "#c62828"
C_EDGE = "#8a8a8a"
C_INCONC = "#e08a00"
VERDICT_COLOURS = {"pass": C_CURVE, "fail": C_BAD, "inconclusive": C_INCONC, "invalid": "#555555"}


@dataclass
class Trace:
    """An additional response drawn over the main one.

    Parameters
    ----------
    freq_hz, gain_db : array_like
        Frequencies (Hz) and gains (dB, as compared with the mask).
    label : str
    phase_deg, group_delay_s : array_like, optional
        At `freq_hz`, for the lower panel.
    u_gain_db : array_like, optional
        Expanded uncertainty of the gain (dB), drawn as a band (curve) or error bars (points).
    style : {'curve', 'points'}
    colour : str, optional
    """

    freq_hz: Any
    gain_db: Any
    label: str = ""
    phase_deg: Any = None
    group_delay_s: Any = None
    u_gain_db: Any = None
    style: str = "curve"
    colour: str | None = None


def bode_plot(mask: Mask, freq_hz, gain_db, *, path, phase_deg=None, group_delay_s=None,
              phase_freq_hz=None, u_gain_db=None, u_phase_deg=None, verdicts=None,
              style: str = "auto", label: str | None = None, title: str = "", subtitle: str = "",
              extra: Sequence[Trace] = (), annotate_worst: bool = True, lower: str = "auto",
              dpi: int = 120):
    """Draw a Bode plot over a tolerance mask and write it as PNG.

    Parameters
    ----------
    mask : harness.mask.Mask
        Its bands, limit lines, transition ceiling and phase rule are drawn.
    freq_hz : array_like, shape (n,)
        Frequencies in Hz (points at 0 Hz cannot appear on the log axis and are skipped).
    gain_db : array_like, shape (n,)
        Gain in dB as compared with the mask (relative to the reference gain when the
        mask has a reference frequency).
    path : str, Path or binary file object
        Where the PNG goes. A path is written atomically (temporary file in the same
        folder, then os.replace); a file object receives the PNG bytes.
    phase_deg : array_like, optional
        Phase in degrees (at `phase_freq_hz`, or at `freq_hz` when that is not given).
    group_delay_s : array_like, optional
        Group delay in seconds (same frequencies as `phase_deg`). Shown instead of the
        phase when the mask limits the group delay (``lower='auto'``).
    phase_freq_hz : array_like, optional
        Frequencies of `phase_deg` / `group_delay_s` when they differ from `freq_hz`.
    u_gain_db, u_phase_deg : array_like, optional
        Expanded uncertainties (same shape as `gain_db` / `phase_deg`), drawn as error
        bars for points or as a shaded band for a curve.
    verdicts : sequence of str, optional
        Per-point verdicts ('pass', 'fail', 'inconclusive') colouring measured points.
    style : {'auto', 'curve', 'points'}
        'auto' draws points with markers for up to 300 frequencies, a line beyond.
    label : str, optional
        Legend label of the main response (default 'design' for a curve, 'measured' for points).
    title, subtitle : str
    extra : sequence of Trace
        Further responses (e.g. a quantised design), drawn in other colours.
    annotate_worst : bool
        Mark and label the point with the smallest margin.
    lower : {'auto', 'phase', 'group_delay', 'none'}
        What the bottom panel shows. 'auto': the group delay when the mask limits it
        and `group_delay_s` is given, else the phase when given, else no panel.
    dpi : int

    Returns
    -------
    Path or None
        The written path (None when `path` is a file object).
    """
    fig, _ = bode_figure(mask, freq_hz, gain_db, phase_deg=phase_deg, group_delay_s=group_delay_s,
                         phase_freq_hz=phase_freq_hz, u_gain_db=u_gain_db, u_phase_deg=u_phase_deg,
                         verdicts=verdicts, style=style, label=label, title=title, subtitle=subtitle,
                         extra=extra, annotate_worst=annotate_worst, lower=lower, dpi=dpi)
    return _save(fig, path)


def bode_figure(mask: Mask, freq_hz, gain_db, *, phase_deg=None, group_delay_s=None,
                phase_freq_hz=None, u_gain_db=None, u_phase_deg=None, verdicts=None,
                style: str = "auto", label: str | None = None, title: str = "", subtitle: str = "",
                extra: Sequence[Trace] = (), annotate_worst: bool = True, lower: str = "auto",
                dpi: int = 120):
    """The figure `bode_plot` writes, without writing it: ``(figure, axes)`` where
    ``axes`` maps 'main', and when drawn 'detail' (pass-band zoom) and 'lower'
    (phase or group delay) to their matplotlib Axes. Same parameters as `bode_plot`."""
    f = np.asarray(freq_hz, float)
    g = np.asarray(gain_db, float)
    if f.shape != g.shape or f.ndim != 1:
        raise ValueError("freq_hz and gain_db must be 1-D arrays of the same length")
    style = ("points" if f.size <= 300 else "curve") if style == "auto" else style
    if style not in ("curve", "points"):
        raise ValueError("style must be 'auto', 'curve' or 'points'")
    label = label or ("design" if style == "curve" else "measured")
    pf = f if phase_freq_hz is None else np.asarray(phase_freq_hz, float)

    # what goes in the lower panel
    has_gd = group_delay_s is not None and np.size(group_delay_s)
    has_ph = phase_deg is not None and np.size(phase_deg)
    if lower == "auto":
        lower = ("group_delay" if has_gd and mask.phase.max_group_delay_s is not None
                 else "phase" if has_ph else "group_delay" if has_gd else "none")
    if lower == "phase" and not has_ph or lower == "group_delay" and not has_gd:
        lower = "none"

    # frequency range
    pos = f[(f > 0) & np.isfinite(f)]
    edges = mask.edges_hz()
    x_hi = max(mask.f_max_hz, float(pos.max()) if pos.size else mask.f_max_hz)
    x_lo_cands = [mask.f_min_hz] if mask.f_min_hz > 0 else []
    if pos.size:
        x_lo_cands.append(float(pos.min()))
    x_lo = min(x_lo_cands) if x_lo_cands else x_hi * 1e-3
    if mask.f_min_hz == 0 and (not pos.size or pos.min() < x_hi * 1e-4):
        x_lo = max(x_lo, x_hi * 1e-4)
    xs = _mask_grid(mask, x_lo, x_hi)
    lo, hi = mask.limits(xs)

    # layout
    main_ylim = _main_ylim(lo, hi, g, [np.asarray(t.gain_db, float) for t in extra])
    detail = _Detail.build(mask, xs, lo, hi, f, g, main_ylim)
    rows = [("main", 3.2)]
    if detail is not None:
        rows.append(("detail", 1.8))
    if lower != "none":
        rows.append(("lower", 1.9))
    fig = Figure(figsize=(10.0, 1.3 + sum(h for _, h in rows)), dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)            # Agg canvas: no display, no pyplot global state
    axes = fig.subplots(len(rows), 1, sharex=True, gridspec_kw={"height_ratios": [h for _, h in rows]})
    axes = np.atleast_1d(axes)
    ax_of = {name: ax for (name, _), ax in zip(rows, axes)}
    for ax in axes:
        ax.set_xscale("log")
        ax.set_xlim(x_lo, x_hi)

    handles = {}
    ax = ax_of["main"]
    _draw_mask(ax, xs, lo, hi, main_ylim, handles)
    _draw_edges(ax, edges, x_lo, x_hi, handles)
    for i, t in enumerate(extra):
        _draw_response(ax, np.asarray(t.freq_hz, float), np.asarray(t.gain_db, float), t.u_gain_db, None,
                       t.style, t.colour or C_EXTRA[i % len(C_EXTRA)], t.label or f"trace {i + 1}", handles,
                       main_ylim, zorder=6, main=False)
    _draw_response(ax, f, g, u_gain_db, verdicts, style, C_CURVE, label, handles, main_ylim, zorder=5)
    ax.set_ylim(*main_ylim)
    ax.set_ylabel("gain dB")
    _mark_off_scale(ax, f, g, main_ylim, handles)
    if annotate_worst:
        _annotate_worst(ax, mask, f, g, g, main_ylim, handles, main=True)
        for i, t in enumerate(extra):
            tg = np.asarray(t.gain_db, float)
            _annotate_worst(ax, mask, np.asarray(t.freq_hz, float), tg, tg, main_ylim, handles, main=False,
                            colour=t.colour or C_EXTRA[i % len(C_EXTRA)], label=f"worst margin ({t.label})")

    if detail is not None:
        ax = ax_of["detail"]
        d = detail
        _draw_mask(ax, xs, d.lo, d.hi, d.ylim, handles)
        _draw_edges(ax, edges, x_lo, x_hi, None)
        for i, t in enumerate(extra):
            tf = np.asarray(t.freq_hz, float)
            _draw_response(ax, tf, d.shift(mask, tf, np.asarray(t.gain_db, float)), t.u_gain_db, None, t.style,
                           t.colour or C_EXTRA[i % len(C_EXTRA)], t.label or f"trace {i + 1}", handles, d.ylim,
                           zorder=6, main=False)
        dev = d.shift(mask, f, g)
        _draw_response(ax, f, dev, u_gain_db, verdicts, style, C_CURVE, label, handles, d.ylim, zorder=5)
        ax.set_ylim(*d.ylim)
        ax.set_ylabel("dB")
        ax.text(0.005, 0.97, d.caption, transform=ax.transAxes, ha="left", va="top", fontsize=7.5,
                color="#444444", bbox=dict(boxstyle="square,pad=0.15", fc="white", ec="none", alpha=0.85),
                zorder=9)
        if annotate_worst:
            _annotate_worst(ax, mask, f, g, dev, d.ylim, handles, main=False)
            for i, t in enumerate(extra):
                tf, tg = np.asarray(t.freq_hz, float), np.asarray(t.gain_db, float)
                _annotate_worst(ax, mask, tf, tg, d.shift(mask, tf, tg), d.ylim, handles, main=False,
                                colour=t.colour or C_EXTRA[i % len(C_EXTRA)], label=f"worst margin ({t.label})")

    if lower != "none":
        ax = ax_of["lower"]
        # tint where a pass-band phase rule or the delay limit applies
        if mask.phase.rule in ("linear", "zero") or (lower == "group_delay" and mask.phase.max_group_delay_s):
            for b in mask.pass_bands():
                ax.axvspan(max(b.start_hz, x_lo), b.stop_hz, color=C_OK_FILL, alpha=0.45, lw=0, zorder=0)
        _draw_edges(ax, edges, x_lo, x_hi, None)
        if lower == "group_delay":
            _draw_group_delay(ax, mask, pf, np.asarray(group_delay_s, float), extra, handles, x_lo)
        else:
            _draw_phase(ax, mask, pf, np.asarray(phase_deg, float), u_phase_deg, extra, style, handles)

    for ax in axes:
        ax.set_xlim(x_lo, x_hi)
        ax.grid(True, which="major", color="#d0d0d0", lw=0.6)
        ax.grid(True, which="minor", color="#ececec", lw=0.4)
        ax.tick_params(labelsize=8.5)
        ax.set_axisbelow(True)
    axes[-1].xaxis.set_major_formatter(EngFormatter(unit="Hz", sep="\u2009"))
    axes[-1].xaxis.set_minor_locator(LogLocator(subs=np.arange(2, 10)))
    axes[-1].xaxis.set_minor_formatter(NullFormatter())
    axes[-1].set_xlabel("frequency")
    if mask.sample_rate_hz:
        nyq = mask.sample_rate_hz / 2
        if x_lo < nyq <= x_hi * 1.0001:
            for ax in axes:
                ax.axvline(nyq, color="#444444", lw=0.8, ls=":", zorder=1)
            axes[0].annotate("fs/2", (nyq, 1.0), xycoords=("data", "axes fraction"), xytext=(-2, -2),
                             textcoords="offset points", ha="right", va="top", fontsize=7.5, color="#444444")
    if title:
        fig.suptitle(title, fontsize=11, fontweight="bold")
    if subtitle:
        axes[0].set_title(subtitle, fontsize=8.5, color="#444444", loc="left")
    order = [k for k in ("curve", "extra0", "extra1", "extra2", "u", "window", "forbidden", "edge",
                         "worst", "offscale", "gdlimit", "phaselimit") if k in handles]
    order += [k for k in handles if k not in order]
    fig.legend([handles[k][0] for k in order], [handles[k][1] for k in order], loc="outside lower center",
               ncol=min(5, len(order)), fontsize=8, frameon=False)
    return fig, ax_of


# --------------------------------------------------------------------------------------
def _mask_grid(mask: Mask, x_lo: float, x_hi: float) -> np.ndarray:
    base = np.geomspace(x_lo, x_hi, 1500)
    e = mask.edges_hz()
    steps = np.concatenate([e, e * (1 - 1e-9), e * (1 + 1e-9)])
    xs = np.unique(np.concatenate([base, steps]))
    return xs[(xs >= x_lo) & (xs <= x_hi)]


def _finite(*arrays) -> np.ndarray:
    vals = [np.asarray(a, float).ravel() for a in arrays if a is not None and np.size(a)]
    if not vals:
        return np.zeros(0)
    v = np.concatenate(vals)
    return v[np.isfinite(v)]


def _main_ylim(lo, hi, g, extras):
    """Y range that shows the limits and the response, without letting a deep notch or
    a far stop band squash the rest: at most 30 dB below the lowest limit (and 150 dB
    span); points beyond are marked off scale."""
    lim = _finite(lo, hi)
    data = _finite(g, *extras)
    if lim.size:
        top = max(lim.max(), data.max() if data.size else lim.max())
        top = min(top, lim.max() + 40.0)
        bottom_floor = lim.min() - 30.0
    else:
        top = data.max() if data.size else 0.0
        bottom_floor = top - 80.0
    bottom = max(data.min() if data.size else bottom_floor, bottom_floor, top - 150.0)
    if lim.size:
        bottom = min(bottom, lim.min() - 3.0)
    span = max(top - bottom, 1.0)
    return (bottom - 0.04 * span, top + 0.08 * span)


@dataclass
class _Detail:
    """The tolerance-detail panel: the two-sided windows (pass bands, limit lines with
    both sides) magnified. With windows of one constant centre it shows the gain itself;
    with sloped windows (weighting curves) it shows the gain minus the window centre,
    so every window appears as a level band."""

    lo: np.ndarray          # window limits on the mask grid, shifted; +-inf outside windows
    hi: np.ndarray
    ylim: tuple
    constant: bool
    caption: str

    @classmethod
    def build(cls, mask, xs, lo, hi, f, g, main_ylim):
        both = np.isfinite(lo) & np.isfinite(hi)
        if not np.any(both):
            return None
        with np.errstate(invalid="ignore"):      # -inf + inf outside the windows
            cen = np.where(both, 0.5 * (lo + hi), np.nan)
            half = np.where(both, 0.5 * (hi - lo), np.nan)
        constant = float(np.nanmax(cen) - np.nanmin(cen)) < 1e-9
        off = 0.0 if constant else cen
        lo_d = np.where(both, lo - off, -np.inf)
        hi_d = np.where(both, hi - off, np.inf)
        hw = max(float(np.nanmedian(half)), 0.01)
        c0 = float(np.nanmin(cen)) if constant else 0.0
        a = max(float(lo_d[both].min()), c0 - 4 * hw)
        b = min(float(hi_d[both].max()), c0 + 4 * hw)
        height = b - a
        if height > 0.2 * (main_ylim[1] - main_ylim[0]):
            return None         # the main panel already shows the windows well
        y0, y1 = a - 0.3 * height, b + 0.3 * height
        dev = cls._shift(mask, f, g, constant)
        d = dev[np.isfinite(dev)]
        if d.size:
            y0 = min(y0, max(float(d.min()) - 0.1 * height, a - 2.5 * height))
            y1 = max(y1, min(float(d.max()) + 0.1 * height, b + 2.5 * height))
        caption = ("detail: gain within the two-sided windows" if constant
                   else "detail: gain minus the window centre, within the two-sided windows")
        return cls(lo_d, hi_d, (y0, y1), constant, caption)

    @staticmethod
    def _shift(mask, f, g, constant):
        f = np.asarray(f, float)
        g = np.asarray(g, float)
        if not f.size:
            return g
        lo, hi = mask.limits(f)
        both = np.isfinite(lo) & np.isfinite(hi)
        with np.errstate(invalid="ignore"):
            return np.where(both, g - (0.0 if constant else 0.5 * (lo + hi)), np.nan)

    def shift(self, mask, f, g):
        return self._shift(mask, f, g, self.constant)


def _runs(mask_arr: np.ndarray):
    """Start/stop index pairs (inclusive) of True runs."""
    idx = np.flatnonzero(np.diff(np.concatenate([[0], mask_arr.astype(int), [0]])))
    return list(zip(idx[::2], idx[1::2] - 1))


def _draw_mask(ax, xs, lo, hi, ylim, handles):
    y0, y1 = ylim
    both = np.isfinite(lo) & np.isfinite(hi)
    # allowed window where both sides are limited
    for a, b in _runs(both):
        h = ax.fill_between(xs[a:b + 1], lo[a:b + 1], hi[a:b + 1], color=C_OK_FILL, lw=0, zorder=1)
        handles.setdefault("window", (h, "allowed window"))
    # forbidden regions: above ceilings, below floors
    for arr, above in ((hi, True), (lo, False)):
        fin = np.isfinite(arr)
        for a, b in _runs(fin):
            x = xs[a:b + 1]
            lim = np.clip(arr[a:b + 1], y0 - 1e3, y1 + 1e3)
            if above:
                h = ax.fill_between(x, lim, y1 + 1e3, facecolor=(0.78, 0.16, 0.16, 0.07),
                                    edgecolor=(0.78, 0.16, 0.16, 0.45), hatch="////", lw=0, zorder=1)
            else:
                h = ax.fill_between(x, y0 - 1e3, lim, facecolor=(0.78, 0.16, 0.16, 0.07),
                                    edgecolor=(0.78, 0.16, 0.16, 0.45), hatch="////", lw=0, zorder=1)
            handles.setdefault("forbidden", (h, "forbidden"))
            ax.plot(x, arr[a:b + 1], color=C_BAD, lw=1.0, zorder=3)


def _draw_edges(ax, edges, x_lo, x_hi, handles):
    for e in edges:
        if x_lo <= e <= x_hi:
            ln = ax.axvline(e, color=C_EDGE, lw=0.7, ls=(0, (4, 3)), zorder=2)
            if handles is not None:
                handles.setdefault("edge", (ln, "band edge"))


def _draw_response(ax, f, g, u, verdicts, style, colour, label, handles, ylim, zorder, main=None):
    main = zorder == 5 if main is None else main
    keep = f > 0
    f, g = f[keep], g[keep]
    u = None if u is None or not np.size(u) else np.asarray(u, float)[keep]
    key = "curve" if main else f"extra{len([k for k in handles if k.startswith('extra')])}"
    if key != "curve" and any(v[1] == label for k, v in handles.items() if k.startswith("extra")):
        key = next(k for k, v in handles.items() if v[1] == label)
    gg = np.where(np.isfinite(g), g, np.nan)
    if style == "curve":
        if u is not None:
            hu = ax.fill_between(f, gg - u, gg + u, color=colour, alpha=0.18, lw=0, zorder=zorder - 1)
            handles.setdefault("u", (hu, "expanded uncertainty"))
        (h,) = ax.plot(f, np.clip(gg, ylim[0] - 1e3, None), color=colour, lw=1.4 if main else 1.2,
                       ls="-" if main else (0, (4, 3)), zorder=zorder)
        handles.setdefault(key, (h, label))
        return
    cols = colour
    if verdicts is not None and np.size(verdicts):
        v = np.asarray(verdicts, object)[keep]
        cols = [VERDICT_COLOURS.get(str(x), colour) for x in v]
    if u is not None:
        ax.errorbar(f, gg, yerr=u, fmt="none", ecolor="#7a8fb0", elinewidth=0.9, capsize=2, zorder=zorder - 1)
        handles.setdefault("u", (ax.errorbar([], [], yerr=[], fmt="none", ecolor="#7a8fb0"),
                                 "expanded uncertainty"))
    ax.plot(f, gg, color=colour, lw=0.6, alpha=0.5, zorder=zorder - 1)
    h = ax.scatter(f, gg, s=14, c=cols, edgecolors="white", linewidths=0.4, zorder=zorder)
    handles.setdefault(key, (h, label))
    if verdicts is not None and np.size(verdicts):
        for name in ("fail", "inconclusive"):
            if any(str(x) == name for x in np.asarray(verdicts, object)[keep]):
                hv = ax.scatter([], [], s=14, c=VERDICT_COLOURS[name])
                handles.setdefault(f"v-{name}", (hv, f"{name} point"))


def _mark_off_scale(ax, f, g, ylim, handles):
    """Triangles at the axis edge where the response leaves the y range; the extreme of
    each run is labelled unless a deeper label already sits within 0.12 decade."""
    keep = f > 0
    f, g = f[keep], g[keep]
    for sign, edge, marker in ((-1, ylim[0], "v"), (1, ylim[1], "^")):
        out = g < edge if sign < 0 else g > edge
        marks = []
        for a, b in _runs(out):
            j = a + int(np.argmin(g[a:b + 1]) if sign < 0 else np.argmax(g[a:b + 1]))
            marks.append(j)
        if not marks:
            continue
        (h,) = ax.plot(f[marks], [edge] * len(marks), marker=marker, ms=5.5, color=C_CURVE, clip_on=False,
                       zorder=6, ls="none")
        handles.setdefault("offscale", (h, "off scale (extreme labelled)"))
        labelled: list[float] = []
        for j in sorted(marks, key=lambda j: sign * -g[j] if np.isfinite(g[j]) else -np.inf):
            x = np.log10(f[j])
            if any(abs(x - y) < 0.12 for y in labelled):
                continue
            labelled.append(x)
            txt = f"{g[j]:.0f} dB" if np.isfinite(g[j]) else ("-inf" if sign < 0 else "+inf")
            xl = ax.get_xlim()
            frac = (x - np.log10(xl[0])) / max(np.log10(xl[1]) - np.log10(xl[0]), 1e-9)
            ha, dx = ("left", 3) if frac < 0.04 else ("right", -3) if frac > 0.96 else ("center", 0)
            ax.annotate(txt, (f[j], edge), xytext=(dx, 6 if sign < 0 else -6), textcoords="offset points",
                        ha=ha, va="bottom" if sign < 0 else "top", fontsize=7, color=C_CURVE, zorder=6,
                        bbox=dict(boxstyle="square,pad=0.1", fc="white", ec="none", alpha=0.8))


def _annotate_worst(ax, mask, f, g, shown, ylim, handles, *, main: bool, colour: str = C_BAD,
                    label: str = "worst margin"):
    """Mark the point of smallest margin (computed from `g`) at its drawn value `shown`;
    the main panel's main response also gets a label with the numbers."""
    if not f.size:
        return
    lo, hi = mask.limits(f)
    m = margin(g, lo, hi)
    if np.all(np.isnan(m)):
        return
    j = int(np.nanargmin(np.where(np.isnan(m), np.inf, m)))
    if not (f[j] > 0):
        return
    gy = shown[j] if np.isfinite(shown[j]) else (ylim[0] if main else np.nan)
    if not np.isfinite(gy):
        return
    if not (ylim[0] <= gy <= ylim[1]):
        if not main:
            return
        gy = min(max(gy, ylim[0]), ylim[1])
    (h,) = ax.plot([f[j]], [gy], marker="o", ms=8 if colour == C_BAD else 6.5, mfc="none", mec=colour, mew=1.6,
                   zorder=7, ls="none", clip_on=False)
    handles.setdefault("worst" if colour == C_BAD else f"worst-{label}", (h, label))
    if not main:
        return
    xl = ax.get_xlim()
    lx0 = np.log10(xl[0]) if xl[0] > 0 else np.log10(f[f > 0].min())
    frac = (np.log10(f[j]) - lx0) / max(np.log10(max(xl[1], f.max())) - lx0, 1e-9)
    yfrac = (gy - ylim[0]) / (ylim[1] - ylim[0])
    dx = -14 if frac > 0.6 else 14
    dy = -22 if yfrac > 0.5 else 22
    ax.annotate(f"worst margin {m[j]:+.3f} dB\nat {_hz(f[j])}, gain {g[j]:+.3f} dB", (f[j], gy),
                xytext=(dx, dy), textcoords="offset points", ha="right" if dx < 0 else "left",
                va="top" if dy < 0 else "bottom", fontsize=8, color=C_BAD, zorder=8,
                bbox=dict(boxstyle="round,pad=0.25", fc="white", ec=C_BAD, lw=0.6, alpha=0.92),
                arrowprops=dict(arrowstyle="-", color=C_BAD, lw=0.7))


def _hz(x: float) -> str:
    return EngFormatter(unit="Hz", places=4, sep="\u2009")(x).replace(".0000", "")


def _draw_group_delay(ax, mask, pf, gd, extra, handles, x_lo):
    lim = mask.phase.max_group_delay_s
    vals = _finite(gd)
    scale, unit = (1e3, "ms")
    ref = max(abs(lim) if lim else 0.0, float(np.max(np.abs(vals))) if vals.size else 0.0)
    if ref < 1e-3:
        scale, unit = (1e6, "\u00b5s")
    keep = pf > 0
    shown = gd * scale
    extra_gd = []
    for i, t in enumerate(extra):
        if t.group_delay_s is not None and np.size(t.group_delay_s):
            tf = np.asarray(t.freq_hz, float)
            k = tf > 0
            extra_gd.append((tf[k], np.asarray(t.group_delay_s, float)[k] * scale, t.colour or C_EXTRA[i % 3]))
    inpb = mask.in_pass_band(pf) & keep
    pvals = gd[inpb] * scale
    pvals = pvals[np.isfinite(pvals)]
    top = max(float(pvals.max()) if pvals.size else 0.0, lim * scale if lim else 0.0)
    bot = min(float(pvals.min()) if pvals.size else 0.0, 0.0)
    span = max(top - bot, 1e-12)
    ylo, yhi = bot - 0.1 * span, top + 0.35 * span
    ax.set_ylim(ylo, yhi)
    # spikes beside zeros on the unit circle (phase jumps of 180 deg) are cut, not drawn
    shown = np.where((shown > yhi + 0.5 * span) | (shown < ylo - 0.5 * span), np.nan, shown)
    ax.plot(pf[keep], shown[keep], color=C_CURVE, lw=1.3, zorder=5)
    for tf, tg, col in extra_gd:
        tg = np.where((tg > yhi + 0.5 * span) | (tg < ylo - 0.5 * span), np.nan, tg)
        ax.plot(tf, tg, color=col, lw=1.1, ls=(0, (4, 3)), zorder=6)
    if lim:
        for b in mask.pass_bands():
            x = [max(b.start_hz, x_lo), b.stop_hz]
            h = ax.fill_between(x, lim * scale, top + 10 * span, facecolor=(0.78, 0.16, 0.16, 0.07),
                                edgecolor=(0.78, 0.16, 0.16, 0.45), hatch="////", lw=0, zorder=1)
            ax.plot(x, [lim * scale] * 2, color=C_BAD, lw=1.0, zorder=3)
            handles.setdefault("gdlimit", (h, "group-delay limit"))
    ax.set_ylabel(f"group delay {unit}")


def _draw_phase(ax, mask, pf, ph, u, extra, style, handles):
    keep = pf > 0
    rule = mask.phase
    if rule.rule == "limits" and np.any(keep):
        # show the phase as the limits rule judges it: unwrapped, with its value at the
        # first limit-line frequency in (-180, 180] (harness.mask.PhaseRule)
        starts = [ln.start_hz for ln in (rule.upper, rule.lower) if ln is not None]
        i = int(np.argmin(np.abs(np.log(np.where(keep, pf, 1e-30) / min(starts)))))
        ph = np.asarray(ph, dtype=float)
        ph = ph - 360.0 * np.round((ph[i] - (((ph[i] + 180.0) % 360.0) - 180.0)) / 360.0)
    if style == "points" and pf.size <= 300:
        if u is not None and np.size(u):
            ax.errorbar(pf[keep], ph[keep], yerr=np.asarray(u, float)[keep], fmt="none", ecolor="#7a8fb0",
                        elinewidth=0.9, capsize=2, zorder=4)
        ax.plot(pf[keep], ph[keep], color=C_CURVE, lw=0.6, alpha=0.5, zorder=4)
        ax.scatter(pf[keep], ph[keep], s=12, c=C_CURVE, edgecolors="white", linewidths=0.4, zorder=5)
    else:
        if u is not None and np.size(u):
            uu = np.asarray(u, float)[keep]
            ax.fill_between(pf[keep], ph[keep] - uu, ph[keep] + uu, color=C_CURVE, alpha=0.18, lw=0)
        ax.plot(pf[keep], ph[keep], color=C_CURVE, lw=1.3, zorder=5)
    for i, t in enumerate(extra):
        if t.phase_deg is not None and np.size(t.phase_deg):
            tf = np.asarray(t.freq_hz, float)
            k = tf > 0
            ax.plot(tf[k], np.asarray(t.phase_deg, float)[k], color=t.colour or C_EXTRA[i % 3], lw=1.1,
                    ls=(0, (4, 3)), zorder=6)
    rule = mask.phase
    lines = []
    if rule.rule == "limits":
        xs = _mask_grid(mask, max(pf[keep].min(), 1e-12) if np.any(keep) else 1.0, pf.max())
        for line, above in ((rule.upper, True), (rule.lower, False)):
            if line is None:
                continue
            v = line.at(xs)
            fin = np.isfinite(v)
            lines.append((xs[fin], v[fin], above))
    ax.set_ylabel("phase deg")
    vals = _finite(ph[keep], *[v for _, v, _ in lines])
    lo = hi = None
    if vals.size:
        lo, hi = vals.min(), vals.max()
        pad = max(0.08 * (hi - lo), 2.0)
        lo, hi = lo - pad, hi + pad
        ax.set_ylim(lo, hi)
    # forbidden regions drawn to the axis limits (a huge polygon edge can make the
    # renderer hatch the allowed band too)
    for x, v, above in lines:
        ax.plot(x, v, color=C_BAD, lw=1.0, zorder=3)
        edge = hi if above else lo
        if edge is None:
            continue
        ax.fill_between(x, v, np.full(v.shape, edge), where=(v < edge) if above else (v > edge),
                        facecolor=(0.78, 0.16, 0.16, 0.07), edgecolor=(0.78, 0.16, 0.16, 0.45),
                        hatch="////", lw=0, zorder=1)
        handles.setdefault("phaselimit", (ax.plot([], [], color=C_BAD, lw=1.0)[0], "phase limit"))


def _save(fig: Figure, path):
    if hasattr(path, "write"):
        fig.savefig(path, format="png")
        return None
    p = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=str(p.parent) if str(p.parent) else ".")
    try:
        with os.fdopen(fd, "wb") as fh:
            fig.savefig(fh, format="png")
        os.replace(tmp, p)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return p


def png_bytes(*args, **kwargs) -> bytes:
    """`bode_plot` into memory: the PNG as bytes (``path`` is supplied)."""
    buf = io.BytesIO()
    bode_plot(*args, path=buf, **kwargs)
    return buf.getvalue()
