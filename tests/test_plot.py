"""Tests for harness.plot: the Bode plot over a tolerance mask.

The pictures are checked by rendering them and reading pixel colours at known data
coordinates (matplotlib's own transforms), so "the pass window is shaded, the stop band
is hatched, the transition band is clear, the curve is on top" are tested facts, not
hopes. Responses come from scipy.signal.
"""

from __future__ import annotations

import io
import os

import matplotlib.image as mpimg
import numpy as np
import pytest
from matplotlib.colors import to_rgb
from scipy import signal

from harness.mask import Band, LimitLine, Mask, PhaseRule
from harness.plot import C_CURVE, C_OK_FILL, Trace, bode_figure, bode_plot

FS = 48000.0


def lowpass_mask(**kw):
    return Mask((Band("pass", 10, 1000, min_db=-1.0, max_db=1.0), Band("stop", 3000, 20000, max_db=-40.0)),
                sample_rate_hz=FS, **kw)


def butter_curve(order=6, fc=1500.0, n=2000):
    f = np.geomspace(10, 20000, n)
    h = signal.sosfreqz(signal.butter(order, fc, fs=FS, output="sos"), worN=f, fs=FS)[1]
    return f, 20 * np.log10(np.abs(h)), np.degrees(np.unwrap(np.angle(h)))


def render(fig) -> np.ndarray:
    fig.canvas.draw()
    return np.asarray(fig.canvas.buffer_rgba())[..., :3].astype(float) / 255.0


def patch(img, ax, x, y, half=4):
    """Pixels around data point (x, y) of `ax` (image rows run downwards)."""
    px, py = ax.transData.transform((x, y))
    h = img.shape[0]
    r, c = int(round(h - py)), int(round(px))
    return img[r - half:r + half + 1, c - half:c + half + 1].reshape(-1, 3)


def is_reddish(p):
    return (p[:, 0] > p[:, 1] + 0.15) & (p[:, 0] > p[:, 2] + 0.15)


def test_mask_regions_are_drawn_where_they_belong():
    f, g, ph = butter_curve()
    fig, axes = bode_figure(lowpass_mask(), f, g, phase_deg=ph)
    img = render(fig)
    ax = axes["main"]
    green = np.array(to_rgb(C_OK_FILL))
    # inside the pass window (+-1 dB, magnified in the detail panel), away from the
    # curve at 0 dB and the limit lines: light green fill
    p = patch(img, axes["detail"], 100.0, 0.5, half=2)
    assert np.mean(np.all(np.abs(p - green) < 0.06, axis=1)) > 0.8
    # and above the window in the detail panel: hatched red
    assert np.mean(is_reddish(patch(img, axes["detail"], 100.0, 1.4, half=3))) > 0.05
    # above the stop-band ceiling: hatched red
    assert np.mean(is_reddish(patch(img, ax, 8000.0, -15.0, half=8))) > 0.05
    # below the pass-band floor: hatched red
    assert np.mean(is_reddish(patch(img, ax, 50.0, -20.0, half=8))) > 0.05
    # transition band (1000..3000 Hz), away from the curve: clear, no red
    p = patch(img, ax, 1150.0, -55.0, half=6)
    assert not np.any(is_reddish(p))
    # the curve is drawn over the shading: its colour at its own points
    blue = np.array(to_rgb(C_CURVE))
    for fx in (30.0, 300.0, 8000.0):
        gx = float(np.interp(np.log10(fx), np.log10(f), g))
        if axes["main"].get_ylim()[0] < gx:
            p = patch(img, ax, fx, gx, half=1)
            assert np.min(np.linalg.norm(p - blue, axis=1)) < 0.2, fx


def test_writes_png_atomically(tmp_path):
    f, g, ph = butter_curve()
    out = tmp_path / "bode.png"
    out.write_bytes(b"old")
    p = bode_plot(lowpass_mask(), f, g, phase_deg=ph, path=out, title="t")
    assert p == out and out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert sorted(os.listdir(tmp_path)) == ["bode.png"]           # no temporary file left
    img = mpimg.imread(out)
    assert img.shape[0] > 500 and img.shape[1] > 1000
    with pytest.raises(OSError):
        bode_plot(lowpass_mask(), f, g, path=tmp_path / "missing" / "x.png")
    assert sorted(os.listdir(tmp_path)) == ["bode.png"]


def test_file_object_receives_png():
    f, g, ph = butter_curve()
    buf = io.BytesIO()
    assert bode_plot(lowpass_mask(), f, g, phase_deg=ph, path=buf) is None
    assert buf.getvalue()[:4] == b"\x89PNG"


def test_deep_notch_does_not_squash_the_pass_band():
    b, a = signal.iirnotch(1000, 30, fs=FS)
    f = np.unique(np.concatenate([np.geomspace(10, 20000, 3000), [1000.0]]))
    with np.errstate(divide="ignore"):
        g = 20 * np.log10(np.abs(signal.freqz(b, a, worN=f, fs=FS)[1]))
    assert g.min() < -150                      # the exact notch is hundreds of dB down
    mask = Mask((Band("pass", 10, 900, min_db=-0.5, max_db=0.5), Band("stop", 995, 1005, max_db=-20.0),
                 Band("pass", 1100, 20000, min_db=-0.5, max_db=0.5)), sample_rate_hz=FS)
    fig, axes = bode_figure(mask, f, g)
    lo, hi = axes["main"].get_ylim()
    assert -60 < lo < -20 and 0.5 <= hi < 10      # 30 dB below the lowest limit at most
    texts = [t.get_text() for t in axes["main"].texts]
    assert any(t.endswith("dB") and t.startswith("-") and "worst" not in t for t in texts)   # off-scale label
    # the pass-band detail panel shows the +-0.5 dB window at readable scale
    dlo, dhi = axes["detail"].get_ylim()
    assert dhi - dlo < 3


def test_measured_points_with_uncertainty_and_verdicts():
    f = np.geomspace(20, 18000, 30)
    g = 0.3 * np.sin(np.arange(30)) - np.where(f > 15000, 2.0, 0.0)
    u = np.full(30, 0.2)
    verdicts = ["pass"] * 27 + ["inconclusive", "fail", "fail"]
    mask = Mask((Band("pass", 20, 18000, min_db=-1.0, max_db=1.0),), sample_rate_hz=FS)
    fig, axes = bode_figure(mask, f, g, u_gain_db=u, verdicts=verdicts, phase_deg=np.zeros(30),
                            u_phase_deg=np.full(30, 1.0), title="SN 0001")
    ax = axes["main"]
    assert ax.containers                         # error bars
    cols = np.concatenate([c.get_facecolors() for c in ax.collections if hasattr(c, "get_offsets")
                           and len(c.get_offsets()) == 30])
    assert any(np.allclose(c[:3], to_rgb("#c62828"), atol=0.02) for c in cols)
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "measured" in labels and "expanded uncertainty" in labels and "fail point" in labels


def test_lower_panel_is_group_delay_when_the_mask_limits_it():
    f, g, ph = butter_curve()
    sos = signal.butter(6, 1500.0, fs=FS, output="sos")
    gd = sum(signal.group_delay((r[:3], r[3:]), w=f, fs=FS)[1] for r in sos) / FS
    m = lowpass_mask(phase=PhaseRule("none", max_group_delay_s=1e-3))
    _, axes = bode_figure(m, f, g, phase_deg=ph, group_delay_s=gd)
    assert "group delay" in axes["lower"].get_ylabel()
    _, axes = bode_figure(lowpass_mask(), f, g, phase_deg=ph, group_delay_s=gd)
    assert "phase" in axes["lower"].get_ylabel()
    _, axes = bode_figure(lowpass_mask(), f, g)
    assert "lower" not in axes


def test_detail_of_sloped_windows_shows_deviation_from_centre():
    f = np.geomspace(20, 20000, 500)
    # a sloped window (weighting-curve style): centre -20 dB at 20 Hz rising to 0 at 1 kHz
    centre = np.interp(np.log10(f), [np.log10(20), 3, np.log10(20000)], [-20, 0, 0])
    g = centre + 0.4
    lines = ((20, 1000, 20000), (-21.0, -1.0, -1.0)), ((20, 1000, 20000), (-19.0, 1.0, 1.0))
    mask = Mask((Band("limits", 20, 20000, lower=LimitLine(*lines[0]), upper=LimitLine(*lines[1])),))
    fig, axes = bode_figure(mask, f, g)
    caption = [t.get_text() for t in axes["detail"].texts]
    assert any("window centre" in c for c in caption)
    lo, hi = axes["detail"].get_ylim()
    assert lo < -1 and hi > 1 and hi - lo < 5
    # the deviation (+0.4 dB everywhere) is what the detail panel draws
    line = [ln for ln in axes["detail"].get_lines() if len(ln.get_xdata()) == 500][0]
    np.testing.assert_allclose(np.asarray(line.get_ydata(), float), 0.4, atol=1e-9)


def test_zero_hz_points_and_extra_traces():
    mask = Mask((Band("pass", 0, 1000, min_db=-1, max_db=1), Band("stop", 2000, 24000, max_db=-30)),
                sample_rate_hz=FS)
    f = np.linspace(0, 24000, 4001)
    sos = signal.butter(5, 1300, fs=FS, output="sos")
    with np.errstate(divide="ignore"):
        g = 20 * np.log10(np.abs(signal.sosfreqz(sos, worN=f, fs=FS)[1]))
        gq = g + 0.1
    fig, axes = bode_figure(mask, f, g, extra=[Trace(f, gq, label="quantised Q1.15")], title="x")
    assert axes["main"].get_xlim()[0] > 0
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "quantised Q1.15" in labels and "design" in labels
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    assert buf.getvalue()[:4] == b"\x89PNG"
