"""Frequency-response estimation from a capture: complex H with Type A statistics.

Pure functions: a `harness.backends.base.Capture` (response, optional reference,
sample rate, metadata) and the plan that produced the played signal go in
(`harness.stimulus.MultitonePlan` or `SteppedSinePlan`); a `ResponseEstimate` comes
out. Signals are float64 arrays in full-scale units (1.0 = 0 dBFS).

What the capture may do to the played signal, and how it is handled:

* an unknown stream latency (the backend captures ``len(signal) + extra_samples``
  samples; see ``plan.extra_samples``): the start of the stimulus is found by
  cross-correlation with the known signal;
* a capture clock that differs from the playback clock (up to a few hundred ppm):
  estimated, corrected by resampling the capture (`resample_by_ratio`) or by fitting at
  the shifted frequency, and reported with its uncertainty;
* noise: per-point SNR from non-excited bins, Type A covariance from the scatter of
  independent periods / blocks, a ``valid`` mask for points too noisy to use;
* clipping, no signal, no reference, dropouts and a too-short capture raise
  `harness.errors.InvalidMeasurement` with a reason that names the problem.

Conventions
-----------
``h`` is the FULL response at ``freq_hz`` (its phase includes every delay: with a
reference channel the device's own delay relative to the reference; without one the
stream latency as well). ``delay_s`` is the bulk delay in it; ``remove_delay`` shows the
phase without it. ``cov_h[k]`` is the 2x2 covariance of ``[Re h, Im h]`` of the mean
(Type A, ``dof[k]`` degrees of freedom). The clock offset is that of the capture clock
relative to the playback clock, positive when the capture clock runs fast (more capture
samples than played samples per second), in ppm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
import scipy.signal

from harness.errors import InvalidMeasurement

PRESENCE_DB = 15.0           # a tone "is there" when this far above the noise (dB)
DEFAULT_MIN_SNR_DB = 10.0    # below this SNR a point is reported invalid
DEFAULT_CLIP_DBFS = -0.1     # samples at or above this level count as clipping
DEFAULT_MAX_CLOCK_PPM = 250.0
NOISE_BINS_PER_TONE = 8      # non-excited bins averaged for the noise near each tone
MIN_NOISE_BIN = 3            # bins below this (DC drift, 1/f) are not used for noise
DROPOUT_BURST_RATIO = 10.0   # period-difference burst this many times the median = dropout
NEAR_NYQUIST_FRACTION = 0.45   # see _jump_floor
BLOCK_SCATTER_RATIO = 100.0  # stepped sine: block scatter this many times the noise = jump
HARMONICS = 5                # stepped sine: harmonics fitted for distortion and noise
END_GUARD_SAMPLES = 64       # multitone windows end this much before the stimulus ends

_DB = 20.0 / math.log(10.0)


# ======================================================================================
# result
# ======================================================================================
@dataclass
class ResponseEstimate:
    """Complex frequency response with Type A statistics.

    Attributes
    ----------
    freq_hz : ndarray, shape (n,)
        Frequencies actually excited, Hz (the plan's ``freq_hz``), on the PLAYBACK
        clock, i.e. as generated. A capture clock that runs ``clock_offset_ppm`` fast
        sees them at ``freq_hz / (1 + clock_offset_ppm * 1e-6)``; a model of the device
        that lives on the capture clock must be evaluated there.
    h : ndarray of complex, shape (n,)
        Response (output / input) at `freq_hz`, including every delay (module docstring).
    cov_h : ndarray, shape (n, 2, 2)
        Type A covariance of ``[Re h, Im h]`` (of the mean over periods / blocks).
    dof : ndarray, shape (n,)
        Degrees of freedom of `cov_h` (periods - 1, or blocks - 1).
    u_gain_db, u_phase_deg : ndarray, shape (n,)
        Type A standard uncertainties of ``20 log10|h|`` (dB) and ``angle(h)`` (deg),
        propagated from `cov_h` to first order.
    snr_db : ndarray, shape (n,)
        SNR of the response at each point: ``|a|^2 / E|da|^2`` for the estimated
        response phasor ``a`` (all periods / blocks together). When the response noise
        dominates, ``u_gain_db ~ 8.686 / sqrt(2 * 10**(snr_db/10))``.
    valid : ndarray of bool, shape (n,)
        False where the point cannot be used (SNR below the minimum, weak reference).
    invalid_reason : list of (str or None)
        Why each invalid point is invalid.
    noise_floor_db : ndarray, shape (n,)
        The noise near each point expressed as a gain in dB (same scale as
        ``20 log10|h|``): the smallest gain distinguishable from noise there.
    delay_s, u_delay_s : float
        Bulk delay in `h` (integer part from cross-correlation, refined by the
        weighted least-squares phase slope over well-measured points) and its standard
        uncertainty (scaled up by the misfit when the phase is not linear).
    clock_offset_ppm, u_clock_offset_ppm : float
        Estimated capture-vs-playback clock offset and its standard uncertainty.
    distortion_db : float
        Power on non-excited lines (multitone) or harmonics (stepped sine), noise
        removed, relative to the power of the excited tones, dB (-inf when none).
    input_level_dbfs, output_level_dbfs : float
        Peak level at the device input (reference channel, else the digital stimulus)
        and output (response), over the measured part, dBFS.
    method : str
        "multitone" or "stepped-sine".
    notes : list of str
        What was done (clock correction, resampling, delay fit...).
    details : dict
        Further diagnostics (JSON-friendly).
    """

    freq_hz: np.ndarray
    h: np.ndarray
    cov_h: np.ndarray
    dof: np.ndarray
    u_gain_db: np.ndarray
    u_phase_deg: np.ndarray
    snr_db: np.ndarray
    valid: np.ndarray
    invalid_reason: list
    noise_floor_db: np.ndarray
    delay_s: float
    u_delay_s: float
    clock_offset_ppm: float
    u_clock_offset_ppm: float
    distortion_db: float
    input_level_dbfs: float
    output_level_dbfs: float
    method: str
    notes: list = field(default_factory=list)
    details: dict = field(default_factory=dict)

    @property
    def gain_db(self) -> np.ndarray:
        """``20 log10|h|``, dB."""
        with np.errstate(divide="ignore"):
            return _DB * np.log(np.abs(self.h))

    @property
    def phase_deg(self) -> np.ndarray:
        """``angle(h)`` in degrees, wrapped to (-180, 180]."""
        return np.degrees(np.angle(self.h))

    def to_dict(self) -> dict:
        """JSON-serialisable form (complex ``h`` as ``h_re`` / ``h_im``)."""
        def num(v):
            v = float(v)
            return v if math.isfinite(v) else (None if math.isnan(v) else ("inf" if v > 0 else "-inf"))

        def arr(a):
            return [num(v) for v in np.asarray(a, dtype=float).ravel()]

        return {
            "method": self.method,
            "freq_hz": arr(self.freq_hz),
            "h_re": arr(np.real(self.h)),
            "h_im": arr(np.imag(self.h)),
            "gain_db": arr(self.gain_db),
            "phase_deg": arr(self.phase_deg),
            "cov_h": [[arr(row) for row in c] for c in np.asarray(self.cov_h, dtype=float)],
            "dof": arr(self.dof),
            "u_gain_db": arr(self.u_gain_db),
            "u_phase_deg": arr(self.u_phase_deg),
            "snr_db": arr(self.snr_db),
            "noise_floor_db": arr(self.noise_floor_db),
            "valid": [bool(v) for v in self.valid],
            "invalid_reason": [None if r is None else str(r) for r in self.invalid_reason],
            "delay_s": num(self.delay_s),
            "u_delay_s": num(self.u_delay_s),
            "clock_offset_ppm": num(self.clock_offset_ppm),
            "u_clock_offset_ppm": num(self.u_clock_offset_ppm),
            "distortion_db": num(self.distortion_db),
            "input_level_dbfs": num(self.input_level_dbfs),
            "output_level_dbfs": num(self.output_level_dbfs),
            "notes": [str(n) for n in self.notes],
            "details": _jsonable(self.details),
        }


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer, int)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if math.isfinite(v) else (None if math.isnan(v) else ("inf" if v > 0 else "-inf"))
    return obj


# ======================================================================================
# public helpers
# ======================================================================================
def remove_delay(freq_hz, h, delay_s: float) -> np.ndarray:
    """Response with a bulk delay taken out: ``h * exp(+j 2 pi f delay_s)``.

    Parameters
    ----------
    freq_hz : array_like
        Frequencies, Hz.
    h : array_like of complex
        Response including the delay.
    delay_s : float
        Delay to remove, s.

    Returns
    -------
    ndarray of complex
    """
    f = np.asarray(freq_hz, dtype=float)
    return np.asarray(h, dtype=complex) * np.exp(2j * np.pi * f * float(delay_s))


def gain_phase_uncertainty(h, cov_h) -> tuple[np.ndarray, np.ndarray]:
    """First-order propagation of the ``[Re h, Im h]`` covariance to gain and phase.

    ``g = 20 log10|h|``: ``dg/d(Re, Im) = (20/ln 10) (Re, Im) / |h|^2``;
    ``phi = atan2(Im, Re)``: ``dphi/d(Re, Im) = (-Im, Re) / |h|^2`` (GUM, JCGM 100
    clause 5.1.2).

    Returns
    -------
    u_gain_db, u_phase_deg : ndarray
    """
    h = np.atleast_1d(np.asarray(h, dtype=complex))
    c = np.asarray(cov_h, dtype=float).reshape(h.size, 2, 2)
    m2 = np.abs(h) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        jg = np.stack([h.real, h.imag], -1) / m2[:, None] * _DB
        jp = np.stack([-h.imag, h.real], -1) / m2[:, None]
        ug = np.sqrt(np.maximum(np.einsum("ki,kij,kj->k", jg, c, jg), 0.0))
        up = np.degrees(np.sqrt(np.maximum(np.einsum("ki,kij,kj->k", jp, c, jp), 0.0)))
    return ug, up


def sine_fit_3(x, freq_hz: float, sample_rate_hz: float) -> tuple[float, float, float, float]:
    """Three-parameter least-squares sine fit at a known frequency (IEEE Std 1057).

    Fits ``x[n] = A cos(w n) + B sin(w n) + C`` with ``w = 2 pi freq_hz / fs`` and
    ``n = 0..len(x)-1``; the model ``R cos(w n + theta) + C`` then has
    ``R = sqrt(A^2 + B^2)`` and ``theta = atan2(-B, A)``.

    Parameters
    ----------
    x : array_like
        Samples.
    freq_hz : float
        Known frequency, Hz.
    sample_rate_hz : float

    Returns
    -------
    amplitude : float
    phase_rad : float
        Phase at the first sample, rad.
    offset : float
    residual_rms : float
        RMS of ``x - fit``.
    """
    x = np.asarray(x, dtype=float)
    w = 2.0 * np.pi * float(freq_hz) / float(sample_rate_hz)
    a, c, res = _fit3(x, w)
    return float(abs(a)), float(np.angle(a)), float(c), res


def sine_fit_4(x, freq_hz_guess: float, sample_rate_hz: float, *, max_iter: int = 50,
               tol: float = 1e-12) -> tuple[float, float, float, float, float]:
    """Four-parameter least-squares sine fit (IEEE Std 1057): frequency estimated too.

    Starts from a three-parameter fit at `freq_hz_guess`, then iterates: least squares of
    ``x`` on ``[cos w n, sin w n, 1, n (-A sin w n + B cos w n)]`` (the last column is
    the derivative of the model with respect to ``w``) and ``w += dw``, until
    ``|dw| <= tol * w``. Converges when the guess is within about one DFT bin
    (``fs / len(x)``) of the true frequency.

    Returns
    -------
    amplitude : float
    phase_rad : float
        Phase at the first sample, rad.
    offset : float
    freq_hz : float
        Fitted frequency, Hz.
    residual_rms : float
    """
    x = np.asarray(x, dtype=float)
    fs = float(sample_rate_hz)
    w = 2.0 * np.pi * float(freq_hz_guess) / fs
    a, c, _ = _fit3(x, w)
    n = np.arange(x.size, dtype=float)
    for _ in range(max_iter):
        cs, sn = np.cos(w * n), np.sin(w * n)
        A, B = a.real, -a.imag
        d = np.column_stack([cs, sn, np.ones_like(n), n * (-A * sn + B * cs)])
        coef, *_ = np.linalg.lstsq(d, x, rcond=None)
        a = complex(coef[0], -coef[1])
        dw = float(coef[3])
        w_new = w + dw
        if not (0.0 < w_new < np.pi):
            break
        w = w_new
        if abs(dw) <= tol * w:
            break
    a, c, res = _fit3(x, w)
    return float(abs(a)), float(np.angle(a)), float(c), w * fs / (2.0 * np.pi), res


def resample_by_ratio(x, ratio: float, n_out: int | None = None) -> np.ndarray:
    """Resample a capture onto a clock `ratio` times slower: ``y[m] = x(m * ratio)``.

    ``x(t)`` is the band-limited interpolant of the periodic extension of `x` (the
    trigonometric polynomial through its samples, as `scipy.signal.resample` uses). A
    capture starts before the stimulus and ends after the response has decayed, so its
    periodic extension has no artificial jump. To undo a capture clock that runs
    ``ratio = 1 + eps`` fast, resample by ``ratio``.

    Computed as a chirp-z (Bluestein) transform of the one-sided spectrum; written by
    hand because `scipy.signal.czt` forms its chirp as ``w**(k**2/2)``, which loses about
    1e-6 of accuracy on 10^5..10^6-sample captures, while the integer part of the chirp
    phase here is reduced modulo ``2 L`` exactly (about 1e-10). `scipy.signal.resample`
    and `resample_poly` only realise ratios of (small) integers.

    Parameters
    ----------
    x : array_like, shape (L,)
    ratio : float
        Input samples per output sample (> 0).
    n_out : int, optional
        Output length; default ``floor((L - 1) / ratio) + 1``.

    Returns
    -------
    ndarray, shape (n_out,)
    """
    x = np.asarray(x, dtype=float)
    L = x.size
    if n_out is None:
        n_out = int(math.floor((L - 1) / ratio)) + 1
    if L == 0 or n_out <= 0:
        return np.zeros(max(n_out, 0))
    return _resample_spectra([scipy.fft.rfft(x)], L, ratio, int(n_out))[0]


def _resample_spectra(specs: list, L: int, ratio: float, n_out: int) -> list:
    """`resample_by_ratio` of channels given by their one-sided spectra
    (``scipy.fft.rfft`` of ``L`` samples each) onto one output clock: the chirps and the
    FFT of the chirp filter are computed once for all of them."""
    K, M = L // 2 + 1, int(n_out)
    eps = float(ratio) - 1.0
    k = np.arange(max(K, M), dtype=np.int64)
    k2 = (k * k) % (2 * L)                        # exact: pi k^2 / L modulo 2 pi
    kf = k.astype(float)
    chirp = np.exp(1j * (np.pi * k2 / L + np.pi * eps * kf * kf / L))
    del k, k2, kf

    # sum_k c_k W^{k m}, W = exp(j 2 pi ratio / L); k m = (k^2 + m^2 - (m - k)^2) / 2
    nfft = scipy.fft.next_fast_len(K + M - 1)
    b = np.zeros(nfft, dtype=complex)
    b[:M] = np.conj(chirp[:M])
    b[nfft - (K - 1):] = np.conj(chirp[K - 1:0:-1])
    fb = scipy.fft.fft(b, overwrite_x=True)
    del b
    out = []
    for spec in specs:
        a = spec * chirp[:K]                      # c_k = 2 X_k except at DC (and Nyquist)
        if L % 2 == 0:
            a[1:-1] *= 2.0
        else:
            a[1:] *= 2.0
        z = scipy.fft.fft(a, nfft)
        del a
        z *= fb
        z = scipy.fft.ifft(z, overwrite_x=True)[:M]
        z *= chirp[:M]
        out.append(z.real / L)
    return out


# ======================================================================================
# internals: fits, statistics
# ======================================================================================
def _fit3(x: np.ndarray, w: float) -> tuple[complex, float, float]:
    """3-parameter fit; returns the phasor ``a = A - jB`` (so ``x ~ Re(a e^{jwn}) + C``),
    the offset and the residual RMS. (Whole-cycle blocks keep other whole-cycle tones,
    e.g. hum at a multiple of the block rate, out of the estimate; an added trend term
    would break that orthogonality, so there is none.)"""
    n = np.arange(x.size, dtype=float)
    d = np.column_stack([np.cos(w * n), np.sin(w * n), np.ones_like(n)])
    coef, *_ = np.linalg.lstsq(d, x, rcond=None)
    res = x - d @ coef
    return complex(coef[0], -coef[1]), float(coef[2]), float(np.sqrt(np.mean(res * res)))


def _ratio_of_means(yp: np.ndarray, up: np.ndarray | None, s: np.ndarray | None):
    """Ratio of averaged spectra and its Type A covariance (Pintelon & Schoukens).

    ``G = mean(Y_p) / mean(U_p)`` (not the mean of ratios). With ``e_p = (Y_p - G U_p) /
    mean(U)`` the covariance of ``[Re G, Im G]`` is ``sum_p e_p e_p^T / (P (P-1))``,
    whose trace is ``(s2_Y + |G|^2 s2_U - 2 Re(conj(G) s_YU)) / |U|^2``. Without a
    measured input, ``U`` is the known stimulus `s` (no input noise).

    Parameters
    ----------
    yp : (P, n) complex
    up : (P, n) complex or None
    s : (n,) complex or None

    Returns
    -------
    g : (n,) complex
    cov : (n, 2, 2)
    y_mean, u_mean : (n,) complex
    """
    p = yp.shape[0]
    ym = yp.mean(axis=0)
    if up is not None:
        um = up.mean(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            g = ym / um
            e = (yp - g[None, :] * up) / um[None, :]
    else:
        um = np.asarray(s, dtype=complex)
        with np.errstate(divide="ignore", invalid="ignore"):
            g = ym / um
            e = (yp - ym[None, :]) / um[None, :]
    ee = np.stack([e.real, e.imag], axis=-1)              # (P, n, 2)
    cov = np.einsum("pki,pkj->kij", ee, ee) / (p * (p - 1)) if p > 1 else np.full((ym.size, 2, 2), np.nan)
    return g, cov, ym, um


def _drift_allowance(g_blocks: np.ndarray) -> np.ndarray:
    """Variance to add per point for a response still settling during the measurement.

    ``g_blocks`` (B, n) holds the per-period / per-block estimates. A straight line over
    the block index is fitted to each point; when its slope is significant
    (``|c1|^2 > 16 var(c1)``, a false alarm about 3e-4 per point for noise alone), the
    change over the measurement, ``|c1| (B - 1)``, is mostly a transient that has not died
    away, and the mean then misses the settled value by up to about half of it: the
    returned allowance is ``(|c1| (B - 1) / 2)^2`` (to be split over Re and Im), else 0."""
    b, n = g_blocks.shape
    out = np.zeros(n)
    if b < 4:
        return out
    bc = np.arange(b) - (b - 1) / 2.0
    sbb = float(np.sum(bc ** 2))
    mean = g_blocks.mean(axis=0)
    c1 = (bc[:, None] * g_blocks).sum(axis=0) / sbb
    res = g_blocks - mean[None, :] - c1[None, :] * bc[:, None]
    s2 = np.sum(np.abs(res) ** 2, axis=0) / (b - 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = np.abs(c1) ** 2 / (s2 / sbb)
    hit = np.isfinite(stat) & (stat > 16.0)
    out[hit] = (np.abs(c1[hit]) * (b - 1) / 2.0) ** 2
    return out


def _rotate_cov(cov: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Covariance of [Re, Im] after multiplying by exp(j theta)."""
    c, s = np.cos(theta), np.sin(theta)
    r = np.stack([np.stack([c, -s], -1), np.stack([s, c], -1)], -2)   # (n, 2, 2)
    return np.einsum("kij,kjl,kml->kim", r, cov, r)


def _add_phase_variance(cov: np.ndarray, h: np.ndarray, var_phase_rad2: np.ndarray) -> np.ndarray:
    """Add an uncertainty along the phase direction (``h`` times a small angle)."""
    v = np.stack([-h.imag, h.real], -1)
    return cov + var_phase_rad2[:, None, None] * np.einsum("ki,kj->kij", v, v)


def _fit_delay(omega: np.ndarray, phase: np.ndarray, u_phase: np.ndarray) -> tuple[float, float, int]:
    """Weighted least-squares line ``phase = c - omega * d`` (omega in rad/sample).

    The phases are unwrapped by tracking: in order of frequency, each phase takes the
    2 pi branch closest to the line fitted through the points before it. Returns the
    delay ``d`` (samples), its standard uncertainty (scaled by sqrt(chi2/dof) when that
    exceeds 1, i.e. when a single delay does not describe the phase) and the number of
    points used.
    """
    n = omega.size
    if n < 2:
        return 0.0, float("nan"), n
    w = 1.0 / np.maximum(u_phase, 1e-12) ** 2
    ph = np.array(phase, dtype=float)
    for i in range(1, n):
        if i >= 2:
            c, d = _wls_line(omega[:i], ph[:i], w[:i])
            pred = c - omega[i] * d
        else:
            pred = ph[i - 1]
        ph[i] += 2.0 * np.pi * np.round((pred - ph[i]) / (2.0 * np.pi))
    c, d = _wls_line(omega, ph, w)
    om = np.sum(w * omega) / np.sum(w)
    sxx = float(np.sum(w * (omega - om) ** 2))
    if sxx <= 0:
        return float(d), float("nan"), n
    u = math.sqrt(1.0 / sxx)
    if n > 2:
        chi2 = float(np.sum(w * (ph - (c - omega * d)) ** 2)) / (n - 2)
        u *= math.sqrt(max(1.0, chi2))
    return float(d), u, n


def _wls_line(x, y, w):
    sw = np.sum(w)
    xm, ym = np.sum(w * x) / sw, np.sum(w * y) / sw
    sxx = np.sum(w * (x - xm) ** 2)
    if sxx <= 0:
        return float(ym), 0.0
    slope = np.sum(w * (x - xm) * (y - ym)) / sxx
    return float(ym - slope * xm), float(-slope)


def _dbfs(v: float) -> float:
    return 20.0 * math.log10(v) if v > 0 else float("-inf")


def _db10(v):
    with np.errstate(divide="ignore", invalid="ignore"):
        return 10.0 * np.log10(v)


# ======================================================================================
# internals: checks
# ======================================================================================
def _channels(plan, capture):
    """The response and reference channels as float64 arrays (no copy when they already
    are), checked for rate, equal length and finite samples; and the largest and
    smallest sample of each, ``{name: (hi, lo)}`` (``max`` and ``min`` propagate NaN, so
    they also tell whether every sample is finite)."""
    fs = float(plan.sample_rate_hz)
    if abs(float(capture.sample_rate_hz) - fs) > 1e-6 * fs:
        raise InvalidMeasurement(f"the capture runs at {capture.sample_rate_hz:g} Hz but the stimulus was "
                                 f"made for {fs:g} Hz")
    y = np.asarray(capture.response, dtype=float).ravel()
    r = None if capture.reference is None else np.asarray(capture.reference, dtype=float).ravel()
    if r is not None and r.size != y.size:
        raise InvalidMeasurement(f"the reference channel has {r.size} samples and the response {y.size}; "
                                 "the channels must come from one stream")
    ext = {}
    for name, x in (("response", y), ("reference", r)):
        if x is None or x.size == 0:
            continue
        hi, lo = float(np.max(x)), float(np.min(x))
        if not (math.isfinite(hi) and math.isfinite(lo)):
            raise InvalidMeasurement(f"the {name} channel contains non-finite samples (NaN or inf)")
        ext[name] = (hi, lo)
    return y, r, ext


def _check_metadata(capture) -> None:
    md = capture.metadata or {}
    for key in ("dropouts", "dropout", "overflow", "underflow", "xruns"):
        v = md.get(key)
        if v:
            raise InvalidMeasurement(f"dropout: the backend reported {key} = {v!r} during the capture; "
                                     "samples were lost or the stream was interrupted")


def _check_length(n_capture: int, n_signal: int) -> None:
    if n_capture < n_signal:
        raise InvalidMeasurement(f"capture too short: {n_capture} samples captured, the stimulus alone is "
                                 f"{n_signal} samples (capture the signal length plus the latency)")


def _check_clipping(x: np.ndarray | None, name: str, clip_dbfs: float,
                    extremes: tuple[float, float] | None = None) -> None:
    """Raise on clipping: a sample at or above `clip_dbfs`, or flat tops at the extremes
    (`_flat_top_runs`). `extremes`: ``(max(x), min(x))`` when already known."""
    if x is None or x.size == 0:
        return
    lim = 10.0 ** (clip_dbfs / 20.0)
    hi, lo = (float(np.max(x)), float(np.min(x))) if extremes is None else extremes
    peak = max(hi, -lo)                                # max |x| without a copy of |x|
    if peak >= lim:
        n = int(np.count_nonzero(np.abs(x) >= lim))
        raise InvalidMeasurement(f"clipping: the {name} channel reaches {_dbfs(peak):.2f} dBFS ({n} sample(s) at "
                                 f"or above {clip_dbfs:g} dBFS); lower the stimulus level or the gain")
    runs, level = _flat_top_runs(x, hi, lo)
    if runs >= 2:
        raise InvalidMeasurement(f"clipping: the {name} channel has {runs} flat tops at its extreme "
                                 f"({level:+.4f} FS, {_dbfs(abs(level)):.2f} dBFS): runs of equal samples entered "
                                 "by steep steps, the mark of a limiter or an overdriven stage before the converter")


def _min_step(x: np.ndarray, chunk: int = 1 << 16) -> float:
    """Smallest non-zero ``|x[n+1] - x[n]|`` (the quantisation step of a quantised
    signal); 0.0 when `x` is constant. In chunks, so no full-length temporaries."""
    q = np.inf
    for j in range(0, max(x.size - 1, 0), chunk):
        d = np.diff(x[j:j + chunk + 1])
        np.abs(d, out=d)
        d[d == 0] = np.inf
        q = min(q, float(np.min(d)))
    return q if np.isfinite(q) else 0.0


def _runs(idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Runs of consecutive integers in the ascending `idx`: their starts and (exclusive)
    stops."""
    brk = np.flatnonzero(np.diff(idx) > 1)
    return idx[np.concatenate([[0], brk + 1])], idx[np.concatenate([brk, [idx.size - 1]])] + 1


def _flat_top_runs(x: np.ndarray, hi: float | None = None, lo: float | None = None) -> tuple[int, float]:
    """Count flat tops at the channel's maximum and minimum (`hi`, `lo` when known):
    runs of >= 3 equal samples whose entering and leaving steps exceed 4 quantisation
    steps (a natural, quantised peak is entered by steps of about one step). The
    quantisation step is estimated as the smallest non-zero difference between
    consecutive samples (`_min_step`; only needed, and only computed, when the
    maximum or minimum is held for 3 or more samples)."""
    hi = float(np.max(x)) if hi is None else hi
    lo = float(np.min(x)) if lo is None else lo
    worst = (0, 0.0)
    q = None
    for v in (hi, lo):
        if v == 0.0:
            continue
        idx = np.flatnonzero(x == v)
        if idx.size < 3:
            continue
        if q is None:
            q = _min_step(x)
            if q == 0.0:                                # constant signal: no steps at all
                return 0, 0.0
        count = 0
        for a, b in zip(*_runs(idx)):
            if b - a < 3 or a == 0 or b >= x.size:
                continue
            if abs(x[a - 1] - v) > 4 * q and abs(x[b] - v) > 4 * q:
                count += 1
        if count > worst[0]:
            worst = (count, v)
    return worst


def _check_silent(x: np.ndarray | None, name: str) -> None:
    if x is not None and not np.any(x):
        if name == "reference":
            raise InvalidMeasurement("no reference: the reference channel is silent (all samples zero); check the "
                                     "reference (loopback) connection")
        raise InvalidMeasurement("no signal from the device under test: the response channel is silent (all "
                                 "samples zero); the board may be dead, open or not connected")


def _absent(name: str, detail: str) -> InvalidMeasurement:
    if name == "reference":
        return InvalidMeasurement(f"no reference: the reference channel does not carry the stimulus ({detail}); "
                                  "check the reference (loopback) connection")
    return InvalidMeasurement(f"no signal from the device under test: {detail}; the board may be dead, open or "
                              "not connected")


def _xcorr(x: np.ndarray, s: np.ndarray, lo: int, hi: int, reps: int = 1) -> np.ndarray:
    """``c[l - lo] = sum_n S[n] x[n + l]`` for ``lo <= l <= hi`` (``x`` taken as zero
    outside its samples), where ``S`` is `s` repeated `reps` times end to end (a
    periodic stimulus passes one period and its count).

    With ``reps == 1``, by `scipy.signal.fftconvolve` over chunks of `s`, so long
    stimuli need memory of the order of the chunk, not of the whole signal. With
    ``reps > 1`` the capture is first folded onto one period plus the lag span,
    ``F[j] = sum_i x[lo + i N + j]`` (``N = len(s)``), since
    ``c[l - lo] = sum_m s[m] F[m + l - lo]``: one correlation of about ``N`` samples
    instead of ``reps`` of them (the same sums, in another order)."""
    n_lags = hi - lo + 1
    if n_lags <= 0:
        return np.zeros(0)
    if reps > 1:
        n = s.size
        fold = np.zeros(n + n_lags - 1)
        for i in range(reps):
            a0 = lo + i * n                             # x[a0 + j] adds to fold[j]
            a, b = max(a0, 0), min(a0 + fold.size, x.size)
            if b > a:
                fold[a - a0:b - a0] += x[a:b]
        return scipy.signal.fftconvolve(fold, s[::-1], mode="valid")
    pad_lo = max(0, -lo)
    pad_hi = max(0, hi + s.size - x.size)
    if pad_lo or pad_hi:
        x = np.concatenate([np.zeros(pad_lo), x, np.zeros(pad_hi)])
        lo += pad_lo
    chunk = max(1 << 16, 2 * n_lags)
    out = np.zeros(n_lags)
    for j in range(0, s.size, chunk):
        sj = s[j:j + chunk]
        seg = x[lo + j: lo + j + n_lags - 1 + sj.size]
        out += scipy.signal.fftconvolve(seg, sj[::-1], mode="valid")
    return out


def _onset(x: np.ndarray, s: np.ndarray, lo: int = 0, hi: int | None = None, reps: int = 1) -> int:
    """Lag (samples) at which the played signal (`s`, repeated `reps` times) starts in
    `x`: the largest ``|sum_n x[n + lag] s[n]|`` over ``lo <= lag <= hi``
    (cross-correlation with the known stimulus, `_xcorr`; the absolute value so an
    inverting device is found too)."""
    hi = x.size - s.size * reps if hi is None else min(hi, x.size - s.size * reps)
    lo = max(0, lo)
    if hi < lo:
        return lo
    return lo + int(np.argmax(np.abs(_xcorr(x, s, lo, hi, reps))))


def _start(x: np.ndarray, s: np.ndarray, reps: int = 1) -> tuple[int, int | None]:
    """Start of the stimulus (`s` repeated `reps` times) in the capture (`_onset` over
    every lag at which the whole stimulus fits), and a later start when the stimulus
    correlates clearly better (by 5 %) with the capture continued by zeros, i.e. when
    its end looks cut off; None otherwise. See `_check_not_cut`. Lags up to the larger
    of 8192 and twice the extra samples (at most a quarter of the stimulus) past the
    last fit are tried."""
    n_sig = s.size * reps
    adm = x.size - n_sig
    ext = min(n_sig // 4, max(8192, 2 * adm))
    corr = np.abs(_xcorr(x, s, 0, adm + ext, reps))
    lag = int(np.argmax(corr[:adm + 1]))
    late = int(np.argmax(corr))
    if late > adm and corr[late] > 1.05 * corr[lag]:
        return lag, late
    return lag, None


def _check_not_cut(late: int | None, n_capture: int, n_signal: int) -> None:
    """A start found past the last lag at which the whole stimulus fits in the capture
    means its end is cut off (stream latency above the extra samples)."""
    if late is not None:
        raise InvalidMeasurement(
            f"capture too short: the stimulus starts about {late} samples into the capture and runs "
            f"{late - (n_capture - n_signal)} samples past its end (only {n_capture - n_signal} extra samples were "
            "captured); capture more extra samples than the stream latency")


def _parabolic(c: np.ndarray, j: int) -> float:
    if 0 < j < c.size - 1:
        den = c[j - 1] - 2 * c[j] + c[j + 1]
        if den != 0:
            return float(0.5 * (c[j - 1] - c[j + 1]) / den)
    return 0.0


# ======================================================================================
# multitone
# ======================================================================================
def _windows(x: np.ndarray, start: int, n: int, count: int) -> np.ndarray:
    return x[start:start + n * count].reshape(count, n)


def _noise_neighbours(bins: np.ndarray, noise_bins: np.ndarray, m: int) -> np.ndarray | None:
    """Indices into `noise_bins` of the `m` noise bins nearest each tone."""
    if noise_bins.size == 0:
        return None
    m = min(m, noise_bins.size)
    idx = np.searchsorted(noise_bins, bins)
    out = np.empty((bins.size, m), dtype=np.int64)
    for i, (b, j) in enumerate(zip(bins, idx)):
        lo, hi = max(0, j - m), min(noise_bins.size, j + m)
        cand = np.arange(lo, hi)
        order = np.argsort(np.abs(noise_bins[cand] - b), kind="stable")[:m]
        out[i] = cand[order]
    return out


def _presence(x: np.ndarray, start: int, plan, name: str) -> float:
    """Raise if no tone stands PRESENCE_DB above the noise in `x` (alignment-free: the
    tones are periodic, so any whole periods show them). Returns the strongest tone's
    level above the median noise bin, dB."""
    n, p = plan.period_samples, plan.periods
    spec = np.fft.rfft(_windows(x, start, n, p), axis=1)
    pw = np.mean(np.abs(spec) ** 2, axis=0)
    tones = pw[plan.bins]
    nb = plan.noise_bins[plan.noise_bins >= MIN_NOISE_BIN]
    noise = float(np.median(pw[nb])) if nb.size else 0.0
    if noise <= 0:
        if np.max(tones) > 0:
            return float("inf")
        raise _absent(name, "no tone above zero")
    ratio = _db10(tones / noise)
    need = min(2, tones.size)
    if np.count_nonzero(ratio >= PRESENCE_DB) < need:
        raise _absent(name, f"no tone stands {PRESENCE_DB:g} dB above the noise in the {name} "
                            f"(strongest {np.max(ratio):.1f} dB)")
    return float(np.max(ratio))


def _period_displacements(x: np.ndarray, lag: int, plan, max_clock_ppm: float, name: str
                          ) -> tuple[float, list[float]]:
    """Displacement of each period against the next (cross-correlation of consecutive
    captured periods, parabolic sub-sample peak). A clock offset shifts every period by
    the same ``N * eps``; a lost or inserted block shows as one period displaced against
    the others (raises). Returns ``(eps_coarse, displacements)``."""
    n = plan.period_samples
    total = plan.periods + plan.transient_periods
    g = int(math.ceil(max_clock_ppm * 1e-6 * n)) + 3
    i0 = 1 if total >= 4 else 0
    disp, where = [], []
    for i in range(i0, total - 1):
        a0 = lag + i * n
        b0 = lag + (i + 1) * n - g
        b1 = lag + (i + 2) * n + g
        if b0 < 0 or b1 > x.size:
            continue
        blk = x[a0:a0 + n]
        c = scipy.signal.correlate(x[b0:b1], blk, mode="valid")
        j = int(np.argmax(c))
        disp.append(j - g + _parabolic(c, j))
        where.append(a0 + n)
    if not disp:
        return 0.0, []
    d = np.asarray(disp)
    med = float(np.median(d))
    if d.size >= 3:
        mad = 1.4826 * float(np.median(np.abs(d - med)))
        thr = max(0.5, 6.0 * mad)
        bad = np.flatnonzero(np.abs(d - med) > thr)
        if bad.size:
            j = int(bad[np.argmax(np.abs(d[bad] - med))])
            shown = d[j] - med
            if abs(d[j]) >= g - 1:                    # beyond the search window: look wider
                a0 = where[j] - n
                gw = n // 2
                b0, b1 = max(0, a0 + n - gw), min(x.size, a0 + 2 * n + gw)
                c = scipy.signal.correlate(x[b0:b1], x[a0:a0 + n], mode="valid")
                jj = int(np.argmax(c))
                shown = (b0 + jj) - (a0 + n) - med
            raise InvalidMeasurement(
                f"dropout: in the {name} channel the period ending near capture sample {where[j]} is displaced by "
                f"{shown:+.1f} samples against the others (samples lost or inserted; a clock offset would "
                "displace every period alike)")
    eps = med / n
    if abs(eps) > max_clock_ppm * 1e-6:
        raise InvalidMeasurement(
            f"dropout or clock fault: the {name} channel drifts by {eps * 1e6:+.0f} ppm, beyond the "
            f"+-{max_clock_ppm:g} ppm a station clock may be off (steady loss or gain of samples)")
    return eps, disp


def _check_bursts(x: np.ndarray, start: int, stop: int, period: int, name: str) -> None:
    """Dropout check on a periodic stretch ``x[start:stop]``: ``d[n] = x[n + N] - x[n]``
    is noise only; a lost, inserted or zeroed block makes a burst in it. Raises when the
    RMS of d in some block (N/16 samples) exceeds DROPOUT_BURST_RATIO times the median
    block RMS and 1e-3 times the signal RMS. Needs at least 3 periods of d."""
    seg = x[max(0, start):min(stop, x.size)]
    if seg.size < 4 * period:
        return
    d = seg[period:] - seg[:-period]
    blen = max(16, period // 16)
    nb = d.size // blen
    e = np.sqrt(np.mean(np.square(d[:nb * blen], out=d[:nb * blen]).reshape(nb, blen), axis=1))
    med = float(np.median(e))
    sig = math.sqrt(float(np.dot(seg, seg)) / seg.size)
    j = int(np.argmax(e))
    if e[j] > DROPOUT_BURST_RATIO * med and e[j] > 1e-3 * sig:
        raise InvalidMeasurement(
            f"dropout: the {name} channel breaks its periodicity near capture sample {start + j * blen} (or one "
            f"period later) "
            f"(period-to-period difference {_db10(e[j] ** 2 / max(med, 1e-300) ** 2):.0f} dB above its median): "
            "samples lost, inserted or corrupted")


def _check_silent_before(x: np.ndarray, lag: int, n: int, name: str) -> None:
    """Before the place where the stimulus lines up, the capture must not already carry
    it: a block lost after the start of the stimulus moves the bulk of it earlier, and
    the part played before the gap then sits in front of it. Looks at up to N/4 samples
    before ``lag - 64`` (converter pre-ringing and a device's own delay stay out) in
    blocks of 64: raises when one has more than 0.3 times the RMS of the stimulus as
    captured (hum, a DC offset or a device's pre-response stay far below that)."""
    a0, a1 = max(0, lag - n // 4), lag - 64
    if a1 - a0 < 64:
        return
    ref = x[lag + n // 4: lag + n // 2]
    if ref.size == 0:
        return
    sig = float(np.sqrt(np.mean(ref * ref)))
    pre = x[a0:a1]
    nb = pre.size // 64
    e = np.sqrt(np.mean(pre[pre.size - nb * 64:].reshape(nb, 64) ** 2, axis=1))
    if sig > 0 and float(np.max(e)) > 0.3 * sig:
        j = int(np.argmax(e > 0.3 * sig))
        raise InvalidMeasurement(
            f"dropout: the {name} channel already carries the stimulus at capture sample "
            f"{a0 + pre.size - nb * 64 + 64 * j}, before the place where it lines up ({lag}): samples were lost "
            "after its start")


def _check_flat_tops(x: np.ndarray, sigma: float, name: str) -> None:
    """Clipping with noise on top: runs of >= 3 samples within ``max(5 sigma, q)`` of
    the channel's extreme, entered and left by steps larger than ``max(20 sigma, 4 q)``
    (``sigma``: per-sample noise RMS, ``q``: quantisation step). A natural peak, even a
    slow one, approaches its extreme by steps of the order of the band (the curvature
    of a sine near its peak), a clipped one by the slope at the clipping level. Raises
    for two or more such runs."""
    if x.size < 8:
        return
    hi, lo = float(np.max(x)), float(np.min(x))
    # q enters only through max(5 sigma, q) and max(20 sigma, 4 q): when one non-zero
    # step early in x (an upper bound of q) is already <= 5 sigma, q need not be found
    d0 = np.abs(np.diff(x[:4097]))
    d0 = d0[d0 > 0]
    if d0.size and float(np.min(d0)) <= 5.0 * sigma:
        q = 0.0
    else:
        q = _min_step(x)
    tol = max(5.0 * sigma, q)
    step = max(20.0 * sigma, 4.0 * q, 1e-12 * max(hi, -lo))
    for sign, top in ((1.0, hi), (-1.0, -lo)):
        if top <= 0:
            continue
        idx = np.flatnonzero(x >= top - tol) if sign > 0 else np.flatnonzero(x <= -(top - tol))
        runs = 0
        for a0, b0 in zip(*_runs(idx)):
            if b0 - a0 < 3 or a0 == 0 or b0 >= x.size:
                continue
            level = float(np.median(sign * x[a0:b0]))
            if level - sign * x[a0 - 1] > step and level - sign * x[b0] > step:
                runs += 1
        if runs >= 2:
            raise InvalidMeasurement(
                f"clipping: the {name} channel has {runs} flat tops at {sign * top:+.4f} FS "
                f"({_dbfs(top):.2f} dBFS): runs of samples held at one level within the noise, entered by steep "
                "steps - the mark of a limiter or an overdriven stage before the converter")


def _phase_drift(spec: np.ndarray, bins: np.ndarray, noise_var: np.ndarray) -> tuple[float, float, int]:
    """Clock offset from the drift of the tone phases across periods.

    With the capture clock fast by ``eps``, tone ``b`` advances by ``-2 pi b eps``
    (mod 2 pi) per ``N``-sample period: ``psi_pk = -2 pi b_k eps (p - pbar)`` where
    ``psi_pk`` is the phase of period ``p`` relative to the tone's mean phasor. Weighted
    least squares over tones with weights ``2 |X_k|^2 / sigma_k^2`` (inverse phase
    variance per period); standard uncertainty from the weights, scaled by
    sqrt(chi2/dof) when above 1. Only tones 20 dB above the noise are used.

    Returns ``(eps, u_eps, tones_used)``.
    """
    p = spec.shape[0]
    xm = spec.mean(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = 2.0 * np.abs(xm) ** 2 / noise_var
    use = np.isfinite(w) & (w > 2.0 * 100.0)
    if p < 2 or not np.any(use):
        return 0.0, float("nan"), 0
    psi = np.angle(spec[:, use] * np.conj(xm[use])[None, :])
    b = bins[use].astype(float)
    wk = w[use]
    pc = np.arange(p) - (p - 1) / 2.0
    spp = float(np.sum(pc ** 2))
    den = 2.0 * np.pi * float(np.sum(wk * b * b)) * spp
    eps = -float(np.sum(wk * b * (pc[:, None] * psi).sum(axis=0))) / den
    resid = psi + 2.0 * np.pi * b[None, :] * eps * pc[:, None]
    dof = max(1, p * b.size - b.size - 1)
    chi2 = float(np.sum(wk[None, :] * resid ** 2)) / dof
    u = 1.0 / (2.0 * np.pi * math.sqrt(float(np.sum(wk * b * b)) * spp)) * math.sqrt(max(1.0, chi2))
    return eps, u, int(b.size)


def estimate_multitone(plan, capture, *, min_snr_db: float = DEFAULT_MIN_SNR_DB,
                       clip_dbfs: float = DEFAULT_CLIP_DBFS, max_clock_ppm: float = DEFAULT_MAX_CLOCK_PPM,
                       correct_clock: bool | None = None) -> ResponseEstimate:
    """Estimate the response from a multitone capture.

    Steps
    -----
    1. Checks: sample rate, backend flags, length, clipping (samples at or above
       `clip_dbfs`, or flat tops), silent channels.
    2. Start of the stimulus: the lag of the largest cross-correlation between the
       capture and the played signal (`scipy.signal.fftconvolve`; the played signal is
       whole periods, so the capture is first folded onto one period, `_xcorr`), on the
       reference channel when present, else on the response. Over the whole signal the
       true start beats a start one period off (more periods overlap).
    3. Presence: at least two tones PRESENCE_DB above the median noise bin, on the
       reference (else "no reference") and on the response (else "no signal from the
       device under test").
    4. Clock and dropouts: consecutive periods are cross-correlated; the median
       displacement gives a coarse clock offset, one displaced period means samples were
       lost or inserted (raises). The drift of the tone phases across periods refines the
       offset (`_phase_drift`). When the offset is significant (> 3 standard
       uncertainties; or always / never with ``correct_clock=True / False``), the whole
       capture is resampled onto the playback clock by `resample_by_ratio` (exact
       band-limited interpolation, so the tones fall back onto their bins) and the start
       is found again near its old place. A burst in the period-to-period difference
       after that also means a dropout (raises): checked over the measured periods, and
       on the reference channel (no device transient there) from the start of the
       stimulus on; the capture must also not carry the stimulus before the place where
       it lines up. Without a reference channel a block lost during the transient
       periods (while the device settles) cannot be told from a longer latency: the
       gain stays right, the phase and delay take the gap; backends should report
       stream errors in ``capture.metadata``.
    5. Transient periods are discarded; each measured period is FFT'd; the response is
       the ratio of the averaged spectra ``Y/U`` at the excited bins (Pintelon &
       Schoukens), with ``U`` the reference channel or else the known digital stimulus
       (then ``h`` also takes ``exp(-j w lag)`` so it includes the stream latency); the
       Type A covariance comes from the period-to-period scatter (`_ratio_of_means`),
       ``P - 1`` degrees of freedom. Without a reference, the clock-offset uncertainty
       adds a phase term.
    6. SNR and noise floor from the period-to-period scatter of the nearest
       NOISE_BINS_PER_TONE non-excited bins; distortion from the non-excited lines
       (noise removed); bulk delay from the lag of the response's cross-correlation
       with the stimulus (relative to the reference's, with a reference) plus the
       weighted phase slope (`_fit_delay`).

    Parameters
    ----------
    plan : harness.stimulus.MultitonePlan
    capture : harness.backends.base.Capture
    min_snr_db : float
        Points with a lower SNR are marked invalid (not an exception).
    clip_dbfs : float
        Clipping threshold, dBFS.
    max_clock_ppm : float
        Largest believable clock offset; a larger steady drift raises.
    correct_clock : bool, optional
        Force (True) or forbid (False) the clock correction; default: when significant.

    Returns
    -------
    ResponseEstimate

    Raises
    ------
    harness.errors.InvalidMeasurement
        Clipping, no signal, no reference, dropouts, a too-short capture.
    """
    fs = float(plan.sample_rate_hz)
    n, t_per, p = int(plan.period_samples), int(plan.transient_periods), int(plan.periods)
    bins = np.asarray(plan.bins, dtype=np.int64)
    k = bins.size
    if p < 2:
        raise InvalidMeasurement("a multitone measurement needs at least 2 measured periods for a Type A estimate")
    period = plan.signal_period()
    reps = t_per + p                                   # signal() is `reps` periods
    n_sig = n * reps
    s_spec = np.fft.rfft(period)
    y, r, ext = _channels(plan, capture)
    _check_metadata(capture)
    _check_length(y.size, n_sig)
    _check_clipping(r, "reference", clip_dbfs, ext.get("reference"))
    _check_clipping(y, "response", clip_dbfs, ext.get("response"))
    _check_silent(r, "reference")
    _check_silent(y, "response")
    notes: list[str] = []
    details: dict = {"period_samples": n, "periods": p, "transient_periods": t_per}

    a = r if r is not None else y
    align = "reference" if r is not None else "response"
    lag0, late = _start(a, period, reps)
    first = lag0 + t_per * n
    presence = {}
    if r is not None:
        presence["reference_db"] = _presence(r, first, plan, "reference")
    presence["response_db"] = _presence(y, first, plan, "response")
    details["presence_db"] = presence

    # -- clock: coarse from period displacements, fine from the tone phase drift -------
    eps_c, disp = _period_displacements(a, lag0, plan, max_clock_ppm, align)
    if r is not None:
        _period_displacements(y, lag0, plan, max_clock_ppm, "response")
    _check_not_cut(late, a.size, n_sig)
    details["coarse_clock_ppm"] = eps_c * 1e6
    details["period_displacements"] = [float(v) for v in disp]
    nb_all = np.asarray(plan.noise_bins, dtype=np.int64)
    nb_use = nb_all[nb_all >= MIN_NOISE_BIN]
    neigh = _noise_neighbours(bins, nb_use, NOISE_BINS_PER_TONE)

    # The measured windows end END_GUARD_SAMPLES before the stimulus does (when the
    # transient periods leave room): converters with linear-phase filters ring BEFORE
    # the end of a signal, and a shift of whole windows only rotates every period alike.
    guard = min(END_GUARD_SAMPLES, (t_per * n) // 4)

    def per_period(x, lag):
        return np.fft.rfft(_windows(x, lag + t_per * n - guard, n, p), axis=1)

    def analysed(x, lag):
        """Per-period spectra of `x` reduced to what is used: the excited bins of every
        period, and the mean over the periods and the period-to-period variance (ddof
        1) of every bin (the checks below take the bins they need). In blocks of bins,
        so the temporaries stay small; the full spectra are dropped."""
        spec = per_period(x, lag)
        mean = np.empty(spec.shape[1], dtype=complex)
        var = np.empty(spec.shape[1])
        for j in range(0, spec.shape[1], 4096):
            blk = spec[:, j:j + 4096]
            mean[j:j + 4096] = blk.mean(axis=0)
            var[j:j + 4096] = np.var(blk, axis=0, ddof=1)
        return spec[:, bins], (mean, var)

    def tone_noise_var(stats):
        """Per-period noise variance near each tone, from non-excited bins' scatter."""
        if neigh is None:
            return stats[1][bins]
        return stats[1][nb_use][neigh].mean(axis=1)

    drift_cycles = abs(eps_c) * (n / 2) * (t_per + p)
    # resampling (`resample_by_ratio`) starts from the spectrum of the whole channel:
    # kept, since the channel may be resampled twice (coarse, then final ratio)
    full_spec: dict = {}

    def resampled(chans, ratio):
        specs = []
        for name, x in chans:
            if name not in full_spec:
                full_spec[name] = scipy.fft.rfft(x)
            specs.append(full_spec[name])
        return _resample_spectra(specs, a.size, ratio, int(math.floor((a.size - 1) / ratio)) + 1)

    a1, lag1, alpha1 = a, lag0, 1.0
    if drift_cycles > 0.02:                            # tones would leak: resample first
        alpha1 = 1.0 + eps_c
        a1 = resampled([(align, a)], alpha1)[0]
        lag1 = int(round(lag0 / alpha1))
    if lag1 + (t_per + p) * n > a1.size:
        a1, lag1 = a, lag0
    tones_a, stats_a = analysed(a1, lag1)
    if a1 is not a:
        a1 = None                                      # a resampled copy: only its spectrum is reused
    d_eps, u_eps, used = _phase_drift(tones_a, bins, tone_noise_var(stats_a))
    details["clock_tones_used"] = used
    if np.isfinite(u_eps):
        eps = alpha1 * (1.0 + d_eps) - 1.0
        significant = abs(eps) > 3.0 * u_eps
    else:
        eps = eps_c
        significant = abs(eps_c) > 1e-6
        notes.append("no tone strong enough to refine the clock offset; the coarse estimate (from period "
                     "displacements, no uncertainty) is used")
    do_correct = significant if correct_clock is None else bool(correct_clock)
    if do_correct and eps != 0.0:
        alpha = 1.0 + eps
        chans = resampled([("response", y)] + ([("reference", r)] if r is not None else []), alpha)
        y, r = chans[0], (chans[1] if r is not None else None)
        del chans
        a = r if r is not None else y
        guess = int(round(lag0 / alpha))
        half = int(math.ceil(max_clock_ppm * 1e-6 * n_sig)) + 8
        lag = _onset(a, period, guess - half, guess + half, reps)
        notes.append(f"clock offset {eps * 1e6:+.3f} ppm corrected by resampling the capture onto the playback "
                     "clock (exact band-limited interpolation, chirp-z transform)")
    else:
        lag = lag0
        if correct_clock is None and np.isfinite(u_eps):
            notes.append(f"clock offset {eps * 1e6:+.4f} ppm not significant (u = {u_eps * 1e6:.4f} ppm); "
                         "no correction")
    details["clock_corrected"] = bool(do_correct and eps != 0.0)
    full_spec.clear()
    if lag + (t_per + p) * n - guard > a.size:
        over = lag + (t_per + p) * n - guard - a.size
        raise InvalidMeasurement(f"capture too short: the measured periods end {over} samples after the capture "
                                 "(latency or clock stretch beyond the extra samples)")
    w0 = lag + t_per * n - guard                       # start of the first measured window
    # dropouts: in the measured periods (both channels), the reference from just after
    # the start (it carries no device transient), and before the start
    _check_bursts(y, w0, w0 + p * n, n, "response")
    if r is not None:
        _check_bursts(r, min(w0, lag + 64), w0 + p * n, n, "reference")
    _check_silent_before(a, lag, n, align)

    # -- spectra, ratio, covariance ----------------------------------------------------
    # (the clock spectrum is reused when it came from the same channel and lag)
    def spectrum(x):
        return (tones_a, stats_a) if (x is a1 and lag == lag1) else analysed(x, lag)

    yp, stats_y = spectrum(y)
    omega = 2.0 * np.pi * bins / n                     # rad/sample
    if r is not None:
        rp, stats_u = spectrum(r)
        g, cov, ym, um = _ratio_of_means(yp, rp, None)
        h, cov_h = g, cov
    else:
        g, cov, ym, um = _ratio_of_means(yp, None, s_spec[bins])
        h = g * np.exp(-1j * omega * (lag - guard))
        cov_h = _rotate_cov(cov, -omega * (lag - guard))
        if np.isfinite(u_eps) and do_correct:
            pos = (t_per + p / 2.0) * n
            cov_h = _add_phase_variance(cov_h, h, (omega * pos * u_eps) ** 2)
    dof = np.full(k, float(p - 1))
    per = yp / (rp if r is not None else s_spec[bins][None, :])
    if r is None:
        per = per * np.exp(-1j * omega * (lag - guard))[None, :]
    allow = _drift_allowance(per)
    if np.any(allow > 0):
        cov_h = cov_h + (allow / 2.0)[:, None, None] * np.eye(2)[None, :, :]
        hz = ", ".join(f"{f:.6g}" for f in np.asarray(plan.freq_hz)[allow > 0][:6])
        notes.append(f"{int(np.count_nonzero(allow))} point(s) drift from period to period (still settling?), "
                     f"e.g. at {hz} Hz: an allowance for it is added to their uncertainty; more transient "
                     "periods would remove it")
    details["drifting_points"] = int(np.count_nonzero(allow))

    # -- flat tops within the noise (clipping before the converter) ---------------------
    def white_sigma(stats):
        v = stats[1][nb_use] if nb_use.size else np.zeros(1)
        return math.sqrt(float(np.median(v)) / n)     # DFT of white noise: E|X|^2 = N sigma^2
    _check_flat_tops(y[w0:w0 + p * n], white_sigma(stats_y), "response")
    if r is not None:
        _check_flat_tops(r[w0:w0 + p * n], white_sigma(stats_u), "reference")

    # -- SNR, noise floor, validity ----------------------------------------------------
    nv = tone_noise_var(stats_y)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = _db10(np.abs(ym) ** 2 * p / nv)
        floor = _db10(nv / p / np.abs(um) ** 2)
    snr = np.where(np.isnan(snr), -np.inf, snr)
    valid = np.isfinite(h) & (snr >= min_snr_db)
    reasons: list = [None] * k
    for i in np.flatnonzero(snr < min_snr_db):
        reasons[i] = f"SNR {snr[i]:.1f} dB below the {min_snr_db:g} dB minimum (response near the noise floor)"
    if r is not None:
        unv = tone_noise_var(stats_u)
        with np.errstate(divide="ignore", invalid="ignore"):
            snr_u = _db10(np.abs(um) ** 2 * p / unv)
        for i in np.flatnonzero(~(snr_u >= min_snr_db)):
            valid[i] = False
            reasons[i] = f"reference SNR {snr_u[i]:.1f} dB below the {min_snr_db:g} dB minimum"
        details["reference_snr_min_db"] = float(np.min(snr_u))
    ug, up = gain_phase_uncertainty(h, cov_h)

    # -- distortion: the non-excited lines ---------------------------------------------
    def distortion(stats, lines):
        if lines.size == 0:
            return float("nan")
        mean, var = stats[0][lines], stats[1][lines]
        dp = np.maximum(np.abs(mean) ** 2 - var / p, 0.0)
        tp = float(np.sum(np.abs(stats[0][bins]) ** 2))
        return float(_db10(np.sum(dp) / tp)) if tp > 0 else float("nan")

    dist = distortion(stats_y, nb_use)
    details["distortion_even_db"] = distortion(stats_y, nb_use[nb_use % 2 == 0])
    details["distortion_odd_db"] = distortion(stats_y, nb_use[nb_use % 2 == 1])
    if r is not None:
        details["reference_distortion_db"] = distortion(stats_u, nb_use)

    # -- bulk delay --------------------------------------------------------------------
    # integer part: the correlation lag of the response (relative to the reference's
    # when there is one); the phase slope refines it
    if r is not None:
        base = _onset(y, period, lag - n // 2, lag + n // 2, reps) - lag
    else:
        base = lag
    good = valid & (np.radians(up) < 0.1)
    resid = np.angle(h * np.exp(1j * omega * base))
    d_frac, u_d, n_used = _fit_delay(omega[good], resid[good], np.radians(up[good]))
    if n_used < 2:
        d_frac, u_d = 0.0, 1.0 / math.sqrt(12.0)
        notes.append("too few well-measured points for the phase-slope delay; delay from the correlation peak only")
    delay = (base + d_frac) / fs
    details["lag_samples"] = int(lag)
    details["window_start_samples"] = int(w0)
    details["delay_points_used"] = int(n_used)
    if r is None:
        notes.append("no reference channel: h is relative to the digital stimulus and includes the stream latency")

    def peak(x):                                       # max |x| without a copy of |x|
        return max(float(np.max(x)), -float(np.min(x)))
    in_level = peak(r[w0:w0 + p * n]) if r is not None else peak(period)
    out_level = peak(y[w0:w0 + p * n])
    return ResponseEstimate(
        freq_hz=np.asarray(plan.freq_hz, dtype=float).copy(), h=h, cov_h=cov_h, dof=dof, u_gain_db=ug,
        u_phase_deg=up, snr_db=snr, valid=valid, invalid_reason=reasons, noise_floor_db=floor,
        delay_s=float(delay), u_delay_s=float(u_d / fs), clock_offset_ppm=float(eps * 1e6),
        u_clock_offset_ppm=float(u_eps * 1e6), distortion_db=dist, input_level_dbfs=_dbfs(in_level),
        output_level_dbfs=_dbfs(out_level), method="multitone", notes=notes, details=details)


# ======================================================================================
# stepped sine
# ======================================================================================
def _harmonic_fit(x: np.ndarray, w: float, harmonics: int) -> tuple[np.ndarray, float, int]:
    """Least squares of `x` on an offset and ``cos/sin(h w n)`` for the tone (h = 1) and
    its harmonics h = 2..harmonics below 0.98 Nyquist. Returns the phasors per harmonic, the residual variance
    and the number of fitted columns."""
    nn = np.arange(x.size, dtype=float)
    hs = [1] + [h for h in range(2, harmonics + 1) if h * w < 0.98 * np.pi]
    cols = [np.ones_like(nn)]
    for h in hs:
        cols += [np.cos(h * w * nn), np.sin(h * w * nn)]
    d = np.column_stack(cols)
    coef, *_ = np.linalg.lstsq(d, x, rcond=None)
    res = x - d @ coef
    ph = np.array([complex(coef[1 + 2 * i], -coef[2 + 2 * i]) for i in range(len(hs))])
    dof = max(1, x.size - d.shape[1])
    return ph, float(np.sum(res * res) / dof), d.shape[1]


def _jump_floor(freq_hz: float, fs_hz: float) -> float:
    """Smallest relative change (squared) of a tone's phasor taken as a jump.

    1e-6 (a 1 mrad phase step or a 0.1 % amplitude step). Above NEAR_NYQUIST_FRACTION of
    the sample rate 1e-4 (10 mrad, 1 %): converter and resampler filters are not ideal
    there and their phase can wander slowly (seen with a simulated clock offset at 0.48 fs);
    a lost sample still moves such a tone by 2 pi f / fs, about 3 rad."""
    return 1e-4 if freq_hz > NEAR_NYQUIST_FRACTION * fs_hz else 1e-6


def _block_jump(blocks: np.ndarray, residuals: list, m: int, freq_hz: float, where: int, name: str,
                snr_db: float, fs_hz: float = float("inf")) -> InvalidMeasurement | None:
    """A tone whose block phasors scatter BLOCK_SCATTER_RATIO times more than the noise
    within the blocks allows (``4 sigma^2 / m`` per block phasor) has a jump in it. On
    the reference that is a dropout; on the response it is one only when a block also
    fits clearly worse than the others (a discontinuity inside it, or a transient),
    since interference near the tone (hum) makes the blocks scatter alike."""
    if not snr_db >= PRESENCE_DB:
        return None
    sc = float(np.var(blocks, ddof=1))
    med = float(np.median(residuals))
    expect = 4.0 * med ** 2 / max(1, m)
    if not (expect > 0 and sc > BLOCK_SCATTER_RATIO * expect
            and sc > _jump_floor(freq_hz, fs_hz) * abs(np.mean(blocks)) ** 2):
        return None
    if name == "reference":
        return InvalidMeasurement(
            f"dropout: the reference tone at {freq_hz:.6g} Hz jumps between blocks ({_db10(sc / expect):.0f} dB more "
            f"scatter than its noise allows; segment from capture sample {where}): samples lost or inserted")
    if max(residuals) > 3.0 * med:
        return InvalidMeasurement(
            f"dropout or unsettled response: the response at {freq_hz:.6g} Hz jumps between blocks "
            f"({_db10(sc / expect):.0f} dB more scatter than its noise allows; segment from capture sample "
            f"{where}): samples lost or inserted in the capture, or the device not settled")
    return None


def estimate_stepped_sine(plan, capture, *, four_parameter: bool | None = None,
                          min_snr_db: float = DEFAULT_MIN_SNR_DB, clip_dbfs: float = DEFAULT_CLIP_DBFS,
                          max_clock_ppm: float = DEFAULT_MAX_CLOCK_PPM, harmonics: int = HARMONICS
                          ) -> ResponseEstimate:
    """Estimate the response from a stepped-sine capture.

    Steps
    -----
    1. Checks and start of the stimulus as in `estimate_multitone` (cross-correlation
       with the played signal on the reference channel, else the response).
    2. Clock (``four_parameter``): unless False, every step's segment (trimmed by the
       largest drift ``max_clock_ppm`` allows, so it stays inside the tone) gets a
       four-parameter fit (`sine_fit_4`, IEEE Std 1057) on the reference, else the
       response: its frequency ``f_fit = f / (1 + eps)`` gives ``eps`` per step, combined
       with weights from the Cramer-Rao variance of the fitted frequency,
       ``var(w) = 12 sigma^2 / (A^2 n (n^2 - 1))`` (Kay 1993, from memory), and scaled by
       sqrt(chi2/dof). The correction (segment positions ``lag + i (1 + eps)``, fits at
       ``f / (1 + eps)``) is applied when True, or by default when the offset is
       significant (> 3 u); with False the clocks are taken as shared. Without a
       reference, the offset's uncertainty adds a phase term that grows with the time of
       each step.
    3. Per step, each of the plan's ``blocks`` blocks (whole cycles) gets a three-
       parameter fit (IEEE Std 1057) at the known frequency on the response and on the
       reference (or the known stimulus phasor); the phasors are referred to the start
       of the stimulus; ``H`` = ratio of the block-averaged phasors, Type A covariance
       from the block-to-block scatter (`_ratio_of_means`), ``blocks - 1`` degrees of
       freedom.
    4. A fit of DC, the tone and its harmonics over the whole segment gives the noise
       (residual), the SNR, the noise floor and the distortion (harmonic power, noise
       removed). Dropouts (raise): reference blocks that scatter BLOCK_SCATTER_RATIO
       times more than their noise allows, or a reference tone whose phase in its
       settling interval differs from that in its segment; response blocks that scatter
       so while one of them also fits clearly worse ("dropout or unsettled response").
       Leading blocks that fit clearly worse (residual above 3 times the median of the
       second half) are still settling and are left out, with a note and fewer degrees
       of freedom; when fewer than half remain the response is "unsettled" (raises). A
       milder drift from block to block adds an allowance to the uncertainty
       (`_drift_allowance`) and a note.
    5. Bulk delay: correlation lag (plus, with a reference, the response's own lag) and
       the weighted phase slope (`_fit_delay`).

    The blocks are taken END_GUARD_SAMPLES (at most half the settling time) earlier than
    the plan's segments, out of reach of the pre-ringing of the next tone's start in
    linear-phase converter filters; without a reference, where the start found by
    correlation includes the device's delay, half a settling time earlier (still within
    the same tone, which keeps playing while it settles).

    Limitation: without a reference channel a dropout inside a settling interval (not
    inside a capture segment) shifts the later steps unnoticed; backends should report
    their stream errors in ``capture.metadata``.

    Parameters
    ----------
    plan : harness.stimulus.SteppedSinePlan
    capture : harness.backends.base.Capture
    four_parameter : bool, optional
        See step 2.
    min_snr_db, clip_dbfs, max_clock_ppm : float
        As in `estimate_multitone`.
    harmonics : int
        Highest harmonic fitted for distortion and noise.

    Returns
    -------
    ResponseEstimate
    """
    fs = float(plan.sample_rate_hz)
    freq = np.asarray(plan.freq_hz, dtype=float)
    k = freq.size
    nblk = int(plan.blocks)
    m0 = np.asarray(plan.block_samples, dtype=np.int64)
    segs = [(int(a0), int(b0)) for a0, b0 in plan.segments]
    s = plan.signal()
    y, r, ext = _channels(plan, capture)
    _check_metadata(capture)
    _check_length(y.size, s.size)
    _check_clipping(r, "reference", clip_dbfs, ext.get("reference"))
    _check_clipping(y, "response", clip_dbfs, ext.get("response"))
    _check_silent(r, "reference")
    _check_silent(y, "response")
    notes: list[str] = []
    details: dict = {"blocks": nblk}
    a = r if r is not None else y
    lag0, late = _start(a, s)
    w_nom = 2.0 * np.pi * freq / fs
    # The blocks end before their tone does: converters (and resamplers) with
    # linear-phase filters ring BEFORE the next tone starts, so every block moves back
    # by END_GUARD_SAMPLES into the settling interval (the same tone keeps playing
    # there). Without a reference the found start also includes the device's own delay
    # (the correlation peaks after the true start): then they move back by half the
    # settling time.
    half_settle = int(plan.settle_samples) // 2
    shift = min(END_GUARD_SAMPLES, half_settle) if r is not None else half_settle
    details["block_shift_samples"] = shift

    # -- clock -------------------------------------------------------------------------
    eps, u_eps, applied = 0.0, 0.0, False
    if four_parameter is not False:
        guard = int(math.ceil(max_clock_ppm * 1e-6 * s.size)) + 2
        e_k, u_k = [], []
        for i, (a0, b0) in enumerate(segs):
            lo, hi = lag0 - shift + a0 + guard, min(lag0 - shift + b0 - guard, a.size)
            if hi - lo < 16 or (hi - lo) * freq[i] / fs < 2:
                continue
            amp, _, _, f_fit, res = sine_fit_4(a[lo:hi], freq[i], fs)
            nn = hi - lo
            if amp <= 0 or amp ** 2 * nn / (4 * max(res, 1e-300) ** 2) < 100.0:
                continue
            var_w = 12.0 * res ** 2 / (amp ** 2 * nn * (nn * nn - 1.0))
            u_f = math.sqrt(var_w) * fs / (2 * np.pi)
            e_k.append(freq[i] / f_fit - 1.0)
            u_k.append(max(u_f / f_fit, 1e-15))
        if e_k:
            e_arr, u_arr = np.asarray(e_k), np.asarray(u_k)
            wgt = 1.0 / u_arr ** 2
            eps = float(np.sum(wgt * e_arr) / np.sum(wgt))
            u_eps = math.sqrt(1.0 / float(np.sum(wgt)))
            if e_arr.size > 1:
                chi2 = float(np.sum(wgt * (e_arr - eps) ** 2)) / (e_arr.size - 1)
                u_eps *= math.sqrt(max(1.0, chi2))
            applied = bool(four_parameter) or abs(eps) > 3.0 * u_eps
            details["clock_steps_used"] = int(e_arr.size)
        else:
            u_eps = float("nan")
            notes.append("no step strong enough for a four-parameter clock estimate; clocks taken as shared")
    if four_parameter is False:
        notes.append("clocks declared shared (four_parameter=False): no clock estimate")
    if not applied:
        if four_parameter is None and np.isfinite(u_eps) and u_eps > 0:
            notes.append(f"clock offset {eps * 1e6:+.4f} ppm not significant (u = {u_eps * 1e6:.4f} ppm); "
                         "clocks taken as shared")
        eps_used = 0.0
    else:
        eps_used = eps
        notes.append(f"clock offset {eps * 1e6:+.3f} ppm from four-parameter fits; segments placed and fitted "
                     "on the capture clock")
    alpha = 1.0 + eps_used
    details["clock_corrected"] = bool(applied)
    if applied:
        # the start found against the unstretched stimulus is smeared by the drift over
        # the signal; find it again against the stimulus on the capture clock
        s_cap = resample_by_ratio(np.concatenate([s, np.zeros(64)]), 1.0 / alpha)
        half = int(math.ceil(abs(eps_used) * s.size)) + 8
        lag0 = _onset(a, s_cap[:a.size], lag0 - half, lag0 + half)

    # -- per-step fits -----------------------------------------------------------------
    end = lag0 + segs[-1][1] * alpha
    if end > y.size + 0.5:
        raise InvalidMeasurement(f"capture too short: the last tone ends {int(math.ceil(end - y.size))} samples "
                                 "after the capture (latency or clock stretch beyond the extra samples)")
    yb = np.zeros((nblk, k), dtype=complex)
    ub = np.zeros((nblk, k), dtype=complex) if r is not None else None
    snr = np.zeros(k)
    snr_u = np.full(k, np.inf)
    floor = np.zeros(k)
    var_min_y, var_min_r = np.inf, np.inf
    harm_p, fund_p = 0.0, 0.0
    y_peak, r_peak = 0.0, 0.0
    jump = None
    first = np.zeros(k, dtype=np.int64)               # first block used per step
    for i, (a0, b0) in enumerate(segs):
        wc = w_nom[i] / alpha
        blk_res, blk_res_u = [], []
        for b in range(nblk):
            pos = lag0 + (a0 + b * int(m0[i])) * alpha - shift
            n0 = int(round(pos))
            nl = int(round(m0[i] * alpha))
            ref_shift = np.exp(-1j * wc * (n0 - lag0))
            ph, _, res = _fit3(y[n0:n0 + nl], wc)
            yb[b, i] = ph * ref_shift
            blk_res.append(res)
            if r is not None:
                phu, _, res_u = _fit3(r[n0:n0 + nl], wc)
                ub[b, i] = phu * ref_shift
                blk_res_u.append(res_u)
        lo = int(round(lag0 + a0 * alpha)) - shift
        hi = min(int(round(lag0 + b0 * alpha)) - shift, y.size)
        seg_y = y[lo:hi]
        y_peak = max(y_peak, float(np.max(np.abs(seg_y))))
        ph_y, var_y, _ = _harmonic_fit(seg_y, wc, harmonics)
        var_min_y = min(var_min_y, var_y)
        nn = seg_y.size
        noise_ph = 4.0 * var_y / nn                    # E|da|^2 of a phasor from nn samples
        snr[i] = float(_db10(abs(ph_y[0]) ** 2 / noise_ph)) if noise_ph > 0 else float("inf")
        fund_p += abs(ph_y[0]) ** 2
        harm_p += float(np.sum(np.maximum(np.abs(ph_y[1:]) ** 2 - noise_ph, 0.0)))
        u_amp = plan.amplitudes[i]
        if r is not None:
            seg_r = r[lo:hi]
            r_peak = max(r_peak, float(np.max(np.abs(seg_r))))
            ph_r, var_r, _ = _harmonic_fit(seg_r, wc, 1)
            var_min_r = min(var_min_r, var_r)
            u_amp = abs(ph_r[0])
            snr_u[i] = float(_db10(abs(ph_r[0]) ** 2 * nn / (4.0 * var_r))) if var_r > 0 else float("inf")
        floor[i] = float(_db10(noise_ph / u_amp ** 2)) if u_amp > 0 else float("inf")
        # leading blocks that fit clearly worse than the settled second half are still
        # settling: leave them out (at least half of the blocks must remain)
        res_arr = np.asarray(blk_res)
        tail = float(np.median(res_arr[nblk // 2:]))
        f0 = 0
        while f0 < nblk and tail > 0 and res_arr[f0] > 3.0 * tail and snr[i] >= PRESENCE_DB:
            f0 += 1
        first[i] = f0
        if nblk - f0 < max(2, (nblk + 1) // 2):
            if jump is None:
                jump = InvalidMeasurement(
                    f"unsettled response: at {freq[i]:.6g} Hz only {nblk - f0} of {nblk} blocks had settled "
                    f"(segment from capture sample {lo}); the device settles more slowly than settle_s allows")
            f0 = first[i] = 0
        kept = slice(f0, nblk)
        if jump is None and nblk - f0 >= 2:
            jump = _block_jump(yb[kept, i], blk_res[f0:], int(m0[i]), freq[i], lo, "response", snr[i], fs)
        if jump is None and r is not None and nblk - f0 >= 2:
            jump = _block_jump(ub[kept, i], blk_res_u[f0:], int(m0[i]), freq[i], lo, "reference", snr_u[i], fs)
            # the reference keeps its phase through the settling interval (no device there)
            s0 = int(round(lag0 + int(plan.step_starts[i]) * alpha)) + 64
            if jump is None and lo - s0 >= max(64, int(2 * np.pi / wc)):
                phs, _, res_s = _fit3(r[s0:lo], wc)
                phs *= np.exp(-1j * wc * (s0 - lag0))
                um_i = np.mean(ub[:, i])
                diff2 = abs(phs - um_i) ** 2
                # what the clock estimate leaves open: a residual frequency error of
                # u_clk accumulates 2 pi f u_clk T rad over the T seconds between the
                # settling interval and the segment (five of those are allowed; a lost
                # sample at f moves the phase by 2 pi f / fs, far more at high f)
                u_clk = (u_eps if applied else abs(eps) + 3.0 * u_eps) if np.isfinite(u_eps) \
                    else max_clock_ppm * 1e-6
                drift = 5.0 * 2.0 * np.pi * freq[i] * u_clk * (lo - s0) / fs
                if diff2 > BLOCK_SCATTER_RATIO * 4.0 * res_s ** 2 / (lo - s0) and \
                        diff2 > (_jump_floor(freq[i], fs) + drift ** 2) * abs(um_i) ** 2:
                    jump = InvalidMeasurement(
                        f"dropout: the reference tone at {freq[i]:.6g} Hz changes phase between its settling "
                        f"interval and its capture segment (capture samples {s0}..{lo}): samples lost or inserted")
    details["snr_reference_min_db"] = float(np.min(snr_u)) if r is not None else None

    # presence
    if r is not None and np.median(snr_u) < PRESENCE_DB:
        raise _absent("reference", f"median tone SNR {np.median(snr_u):.1f} dB on the reference channel")
    if np.count_nonzero(snr >= PRESENCE_DB) < min(2, k):
        raise _absent("response", f"no tone stands {PRESENCE_DB:g} dB above the noise in the response "
                                  f"(strongest {np.max(snr):.1f} dB)")
    _check_not_cut(late, a.size, s.size)
    region = slice(max(0, lag0 - shift), min(y.size, int(math.ceil(end))))
    _check_flat_tops(y[region], math.sqrt(var_min_y), "response")
    if r is not None:
        _check_flat_tops(r[region], math.sqrt(var_min_r), "reference")
    if jump is not None:
        raise jump

    # -- ratio, covariance (per step: the blocks that had settled) ----------------------
    stim = plan.amplitudes * np.exp(1j * np.asarray(plan.phases_rad, dtype=float))
    h = np.zeros(k, dtype=complex)
    cov_h = np.zeros((k, 2, 2))
    allow = np.zeros(k)
    dof = np.zeros(k)
    for i in range(k):
        sl = slice(int(first[i]), nblk)
        yi = yb[sl, i:i + 1]
        ui = ub[sl, i:i + 1] if r is not None else None
        g_i, c_i, _, _ = _ratio_of_means(yi, ui, None if r is not None else stim[i:i + 1])
        h[i], cov_h[i] = g_i[0], c_i[0]
        allow[i] = _drift_allowance(yi / (ui if r is not None else stim[i:i + 1]))[0]
        dof[i] = yi.shape[0] - 1
    if r is None:
        lag_p = lag0 / alpha
        h = h * np.exp(-1j * w_nom * lag_p)
        cov_h = _rotate_cov(cov_h, -w_nom * lag_p)
        if applied and np.isfinite(u_eps):
            mid = np.array([(a0 + b0) / 2.0 for a0, b0 in segs])
            cov_h = _add_phase_variance(cov_h, h, (w_nom * mid * u_eps) ** 2)
    if np.any(first > 0):
        hz = ", ".join(f"{f:.6g}" for f in freq[first > 0][:6])
        notes.append(f"the first blocks of {int(np.count_nonzero(first))} step(s) were still settling and were left "
                     f"out (e.g. at {hz} Hz; fewer degrees of freedom there); a longer settle_s would keep them")
    details["blocks_left_out"] = [int(v) for v in first]
    if np.any(allow > 0):
        cov_h = cov_h + (allow / 2.0)[:, None, None] * np.eye(2)[None, :, :]
        hz = ", ".join(f"{f:.6g}" for f in freq[allow > 0][:6])
        notes.append(f"{int(np.count_nonzero(allow))} point(s) drift from block to block (still settling?), "
                     f"e.g. at {hz} Hz: an allowance for it is added to their uncertainty; a longer settle_s "
                     "would remove it")
    details["drifting_points"] = int(np.count_nonzero(allow))
    valid = np.isfinite(h) & (snr >= min_snr_db) & (snr_u >= min_snr_db)
    reasons: list = [None] * k
    for i in range(k):
        if snr[i] < min_snr_db:
            reasons[i] = f"SNR {snr[i]:.1f} dB below the {min_snr_db:g} dB minimum (response near the noise floor)"
        elif snr_u[i] < min_snr_db:
            reasons[i] = f"reference SNR {snr_u[i]:.1f} dB below the {min_snr_db:g} dB minimum"
    ug, up = gain_phase_uncertainty(h, cov_h)

    # -- delay -------------------------------------------------------------------------
    if r is not None:
        lag_y = _onset(y, s, lag0 - 4096, lag0 + 4096)
        base = (lag_y - lag0) / alpha
    else:
        base = lag0 / alpha
    good = valid & (np.radians(up) < 0.1)
    resid = np.angle(h * np.exp(1j * w_nom * base))
    d_frac, u_d, n_used = _fit_delay(w_nom[good], resid[good], np.radians(up[good]))
    if n_used < 2:
        d_frac, u_d = 0.0, 1.0 / math.sqrt(12.0)
        notes.append("too few well-measured points for the phase-slope delay; delay from the correlation peak only")
    details["lag_samples"] = int(lag0)
    details["delay_points_used"] = int(n_used)
    if r is None:
        notes.append("no reference channel: h is relative to the digital stimulus and includes the stream latency")
    dist = float(_db10(harm_p / fund_p)) if fund_p > 0 else float("nan")
    in_level = r_peak if r is not None else float(plan.amplitude)
    return ResponseEstimate(
        freq_hz=freq.copy(), h=h, cov_h=cov_h, dof=dof, u_gain_db=ug, u_phase_deg=up, snr_db=snr, valid=valid,
        invalid_reason=reasons, noise_floor_db=floor, delay_s=float((base + d_frac) / fs),
        u_delay_s=float(u_d / fs), clock_offset_ppm=float(eps * 1e6),
        u_clock_offset_ppm=float(u_eps * 1e6) if np.isfinite(u_eps) else float("nan"), distortion_db=dist,
        input_level_dbfs=_dbfs(in_level), output_level_dbfs=_dbfs(y_peak), method="stepped-sine", notes=notes,
        details=details)
