"""Stimulus plans: which frequencies a measurement excites, and the signal it plays.

A plan is built from a profile's ``[stimulus]`` settings and its tolerance mask
(`plan_for_profile`), or directly from a list of frequencies (`multitone_plan`,
`stepped_sine_plan`). Signals are float64 arrays in full-scale units (1.0 = 0 dBFS).

Frequency set
-------------
The measured frequencies are the union of

* the grid: log-spaced with ``points_per_decade`` (or linear with ``points``) from
  ``start_hz`` to ``stop_hz``, by default the mask's range clipped to what the station
  can excite; or the explicit ``frequencies_hz`` list;
* every band edge and limit-line break point of the mask, each snapped to a
  frequency INSIDE its own band (a pass-band edge is never measured in the
  transition band next to it);
* the mask's ``reference_hz`` (snapped inside the band that holds it).

A log grid cannot start at 0 Hz: a range that starts at 0 Hz is gridded from
``LOW_END_DECADES`` decades below its top. A frequency the station cannot excite (0 Hz,
at or above its Nyquist frequency, or above the top usable bin) is dropped and listed in
``plan.uncovered_hz``, never silently; when such an edge bounds a band, the nearest
excitable frequency inside the band is measured in its place. Points that land on the
same bin (or, for a multitone, grid points closer than the tone spacing allows) are
merged, keeping reference and edge points before grid points. ``plan.freq_hz`` always
holds the frequencies actually excited.

Methods
-------
* `MultitonePlan`: all tones at once, on exact FFT bins of one period (coherent, no
  leakage), low crest factor, ``transient_periods`` played and discarded, then
  ``periods`` measured periods.
* `SteppedSinePlan`: one tone after the other, each with an integer number of whole
  cycles in an integer number of samples, a settling time before each capture.

Both have ``signal()``, ``duration_s``, ``crest_factor``, ``report(noise_dbfs_rms)``
(the expected uncertainty before anything is played) and ``extra_samples()`` (how many
samples to capture beyond the signal for a given stream latency).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
from scipy.optimize import minimize

from harness.errors import ConfigError

# -- rules (documented in the docstrings that use them) --------------------------------
LOW_END_DECADES = 3.0          # a range starting at 0 Hz is gridded from top * 10**-3
SETTLE_WIDTH_FACTOR = 10.0     # settle time = 10 / (narrowest band or transition width)
MIN_SETTLE_S = 1e-3
MAX_SETTLE_S = 10.0
LOW_TONE_MIN_BIN = 8           # the lowest multitone tone lies at least 8 bins above DC
MIN_PERIOD_SAMPLES = 1024
MAX_AUTO_PERIOD_SAMPLES = 1 << 19
GRID_PERIOD_CAP_S = 0.5        # resolving the grid's low end may lengthen the period to 0.5 s
STEPPED_TOP_FRACTION = 1.0 - 1.0 / 1024.0   # stepped sine: up to this fraction of Nyquist
STEPPED_FREQ_TOL = 1e-4        # accepted relative frequency adjustment for whole cycles
DEFAULT_MAX_CLOCK_PPM = 250.0  # clock offset margin used by extra_samples()
REFERENCE_LENGTH_FACTOR = 4    # stepped sine: the reference frequency gets 4x the cycles and time

_PRIORITY = {"reference": 0, "edge": 1, "listed": 2, "grid": 3}


# ======================================================================================
# small helpers
# ======================================================================================
def crest_factor(x) -> float:
    """Crest factor (peak / RMS, linear) of a signal; NaN for an all-zero signal.

    Parameters
    ----------
    x : array_like
        Samples (full-scale units).

    Returns
    -------
    float
        ``max|x| / sqrt(mean(x**2))``. A sine has sqrt(2); 20*log10 of it is the crest
        factor in dB.
    """
    x = np.asarray(x, dtype=float)
    rms = float(np.sqrt(np.mean(x * x))) if x.size else 0.0
    if rms == 0.0:
        return float("nan")
    return float(np.max(np.abs(x)) / rms)


def schroeder_phases(n: int, amplitudes=None, phi1: float = 0.0) -> np.ndarray:
    """Schroeder's low-crest-factor phases for `n` tones.

    Schroeder (IEEE Trans. Inf. Theory 16, 1970): for tone ``k`` (1-based) with relative
    power ``p_k`` (summing to 1), ``phi_k = phi_1 - 2*pi * sum_{l<k} (k - l) p_l``; for a
    flat spectrum this is ``phi_k = phi_1 - pi*k*(k-1)/n``.

    Parameters
    ----------
    n : int
        Number of tones (in order of frequency).
    amplitudes : array_like, optional
        Tone amplitudes (default flat).
    phi1 : float
        Phase of the first tone, rad.

    Returns
    -------
    ndarray, shape (n,)
        Phases in rad (not wrapped).
    """
    n = int(n)
    if n <= 0:
        return np.zeros(0)
    k = np.arange(1, n + 1, dtype=float)
    if amplitudes is None:
        return phi1 - np.pi * k * (k - 1.0) / n
    p = np.asarray(amplitudes, dtype=float) ** 2
    p = p / np.sum(p)
    # sum_{l<k} (k - l) p_l = k * C1[k-1] - C2[k-1] with cumulative sums over l < k
    c1 = np.concatenate([[0.0], np.cumsum(p)[:-1]])
    c2 = np.concatenate([[0.0], np.cumsum(p * k)[:-1]])
    return phi1 - 2.0 * np.pi * (k * c1 - c2)


def snap_to_bins(freq_hz, sample_rate_hz: float, n: int, *, mode: str = "nearest",
                 odd: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Snap frequencies to DFT bins of an `n`-sample period.

    Parameters
    ----------
    freq_hz : array_like
        Frequencies in Hz.
    sample_rate_hz : float
        Sample rate, Hz; the bin spacing is ``sample_rate_hz / n``.
    n : int
        Period length in samples.
    mode : {"nearest", "up", "down"}
        Nearest bin, or the nearest bin at or above / at or below each frequency (use
        "up" for a band's lower edge and "down" for its upper edge to stay inside it).
    odd : bool
        Only odd bins (multitone designs that keep even bins free for distortion).

    Returns
    -------
    bins : ndarray of int
        Bin indices (not clipped to the usable range; see `MultitonePlan`).
    freq_hz : ndarray
        The bin frequencies ``bins * sample_rate_hz / n``.
    """
    f = np.asarray(freq_hz, dtype=float)
    x = f * n / float(sample_rate_hz)
    if odd:
        # odd bins are 2*m + 1: snap (x - 1)/2 to an integer m
        y = (x - 1.0) / 2.0
        m = {"nearest": np.rint, "up": lambda v: np.ceil(v - 1e-9), "down": lambda v: np.floor(v + 1e-9)}[mode](y)
        bins = (2 * m + 1).astype(np.int64)
    else:
        r = {"nearest": np.rint, "up": lambda v: np.ceil(v - 1e-9), "down": lambda v: np.floor(v + 1e-9)}[mode](x)
        bins = r.astype(np.int64)
    return bins, bins * float(sample_rate_hz) / n


def derived_settle_s(mask, lowest_hz: float | None = None) -> float:
    """Settling time derived from a mask: ``SETTLE_WIDTH_FACTOR / w_min`` seconds.

    ``w_min`` is the narrowest of: the widths of the bands, and the gaps between a pass
    band and an adjacent stop band (the transition bands). A filter that changes by tens
    of dB within ``w`` Hz has an impulse response lasting of the order of ``1/w``
    (time-bandwidth), and a resonance of bandwidth ``B`` decays with time constant
    ``1/(pi B)``; ten times ``1/w`` leaves a second-order section about 30 time
    constants, i.e. decayed far below -100 dB (common practice, with margin for the
    higher-Q poles of elliptic designs). Gaps next to ``limits`` bands are not counted
    (their steepness is in their lines). When `lowest_hz` is given, the time is at least
    ten time constants of a first-order section at that frequency,
    ``10 / (2 pi lowest_hz)``, since a filter measured there may have a pole there.
    Clipped to [MIN_SETTLE_S, MAX_SETTLE_S].
    """
    bands = sorted(mask.bands, key=lambda b: (b.start_hz, b.stop_hz))
    widths = [b.stop_hz - b.start_hz for b in bands]
    for a, b in zip(bands, bands[1:]):
        gap = b.start_hz - a.stop_hz
        if gap > 0 and {a.kind, b.kind} == {"pass", "stop"}:
            widths.append(gap)
    widths = [w for w in widths if w > 0]
    settle = SETTLE_WIDTH_FACTOR / min(widths) if widths else MIN_SETTLE_S
    if lowest_hz:
        settle = max(settle, SETTLE_WIDTH_FACTOR / (2.0 * math.pi * lowest_hz))
    return float(min(max(settle, MIN_SETTLE_S), MAX_SETTLE_S))


def _true_peak(period: np.ndarray, oversample: int = 4) -> float:
    """Peak of the band-limited periodic signal through `period`, evaluated on a grid
    `oversample` times finer (FFT zero padding): what a reconstruction filter puts out."""
    n = period.size
    spec = np.fft.rfft(period)
    fine = np.fft.irfft(spec, n * oversample) * oversample
    return float(max(np.max(np.abs(fine)), np.max(np.abs(period))))


# ======================================================================================
# crest-factor reduction
# ======================================================================================
def _synth(bins, amplitudes, phases, n):
    spec = np.zeros(n // 2 + 1, dtype=complex)
    spec[bins] = amplitudes * np.exp(1j * phases) * (n / 2.0)
    return np.fft.irfft(spec, n)


def reduce_crest_factor(bins, amplitudes, phases, n: int, *, max_evaluations: int | None = None,
                        oversample: int = 2) -> tuple[np.ndarray, str]:
    """Lower the crest factor of a multitone by changing its phases only.

    Two iterative methods start from `phases` (normally Schroeder's) and the lowest
    crest factor found is kept:

    1. Chebyshev (L-infinity) approximation through L_p norms of increasing order
       (p = 4 ... 256) minimised over the phases by L-BFGS with an analytic gradient
       (Guillaume, Schoukens, Pintelon, Kollar, IEEE Trans. Instrum. Meas. 40(6), 1991).
    2. Time-frequency swapping: clip the time signal at 1.4 times its RMS, take the
       phases of the clipped signal's spectrum at the excited bins, restore the
       amplitudes (and zeros elsewhere), repeat (van der Ouderaa, Schoukens, Renneboog,
       IEEE Trans. Instrum. Meas. 37(1), 1988, from memory) - a polish step.

    The amplitude spectrum never changes, so non-excited bins stay exactly empty.

    Parameters
    ----------
    bins : array_like of int
        Excited bins (0 < bin < n/2).
    amplitudes : array_like
        Tone amplitudes.
    phases : array_like
        Starting phases, rad.
    n : int
        Period length, samples.
    max_evaluations : int, optional
        Budget of objective evaluations; default ``4e6 / n`` within [40, 300] so large
        periods stay fast.
    oversample : int
        The waveform is judged on a grid `oversample` times finer than the samples, so
        the optimisation also lowers the peaks between samples (what a DAC's
        reconstruction filter puts out); 1 judges the samples only.

    Returns
    -------
    phases : ndarray
        The best phases found (the starting phases if nothing was better).
    method : str
        "schroeder", "lp-norm" or "lp-norm+swap": which step gave the result.
    """
    bins = np.asarray(bins, dtype=np.int64)
    amp = np.asarray(amplitudes, dtype=float)
    phi0 = np.asarray(phases, dtype=float)
    if bins.size < 3:
        return phi0.copy(), "schroeder"
    if max_evaluations is None:
        max_evaluations = int(np.clip(4e6 / n, 40, 300))
    # the same tones on a grid `oversample` times finer: the interpolated waveform
    os_ = max(1, int(oversample))
    n = int(n) * os_
    bins = bins * os_
    rms = math.sqrt(float(np.sum(amp ** 2)) / 2.0)
    best_phi, best_cf, method = phi0.copy(), crest_factor(_synth(bins, amp, phi0, n)), "schroeder"

    orders = (4, 8, 16, 32, 64, 128, 256)
    per_order = max(5, max_evaluations // (len(orders) + 1))
    phi = phi0.copy()
    for p in orders:
        def objective(ph, p=p):
            y = _synth(bins, amp, ph, n) / rms
            m = float(np.max(np.abs(y)))
            z = np.abs(y) / m
            v = float(np.sum(z ** p))
            g = z ** (p - 1) * np.sign(y)
            gs = np.fft.rfft(g)[bins]
            # d/dphi_k of log||y||_p; y = sum_k (amp_k/rms) cos(w_k t + phi_k)
            grad = -(amp / rms / m) * np.imag(np.exp(1j * ph) * np.conj(gs)) / v
            return math.log(m) + math.log(v) / p, grad
        res = minimize(objective, phi, jac=True, method="L-BFGS-B", options={"maxiter": per_order})
        phi = np.asarray(res.x, dtype=float)
        cf = crest_factor(_synth(bins, amp, phi, n))
        if cf < best_cf - 1e-12:
            best_phi, best_cf, method = phi.copy(), cf, "lp-norm"

    # polish by swapping, starting from the best so far
    spec = np.zeros(n // 2 + 1, dtype=complex)
    phi = best_phi.copy()
    x = _synth(bins, amp, phi, n)
    level = 1.4 * float(np.sqrt(np.mean(x * x)))
    for _ in range(per_order):
        clipped = np.clip(x, -level, level)
        phi = np.angle(np.fft.rfft(clipped)[bins])
        spec[:] = 0.0
        spec[bins] = amp * np.exp(1j * phi) * (n / 2.0)
        x = np.fft.irfft(spec, n)
        cf = crest_factor(x)
        if cf < best_cf - 1e-12:
            best_phi, best_cf, method = phi.copy(), cf, ("lp-norm+swap" if method != "schroeder" else "swap")
    return best_phi, method


# ======================================================================================
# frequency requests from a profile
# ======================================================================================
@dataclass(frozen=True)
class FrequencyRequest:
    """One frequency a plan should measure, before it is made exact.

    ``target_hz`` is wanted; the realised frequency must lie in ``[lo_hz, hi_hz]``
    (the band of an edge point, so an edge stays inside its band).
    """

    target_hz: float
    lo_hz: float
    hi_hz: float
    kind: str      # reference | edge | listed | grid
    label: str


@dataclass
class _Requests:
    points: list[FrequencyRequest]
    uncovered_hz: list[float]
    notes: list[str]
    lowest_hz: float
    band_widths_hz: list[float]
    grid_spacing_hz: float | None


def _grid(cfg, mask, top_hz: float, notes: list[str]) -> tuple[list[float], str, float | None]:
    """The configured grid, clipped to (0, top_hz], its kind, and its spacing (Hz) at
    the low end (None for fewer than two points)."""
    if cfg.frequencies_hz:
        f = np.sort(np.asarray(cfg.frequencies_hz, dtype=float))
        f = f[(f > 0) & (f <= top_hz)]
        return [float(v) for v in cfg.frequencies_hz], "listed", (float(np.min(np.diff(f))) if f.size > 1 else None)
    high = cfg.stop_hz if cfg.stop_hz is not None else mask.f_max_hz
    if high > top_hz:
        notes.append(f"grid clipped at {top_hz:.6g} Hz (requested up to {high:.6g} Hz; the station "
                     f"cannot excite higher)")
        high = top_hz
    low = cfg.start_hz if cfg.start_hz is not None else mask.f_min_hz
    if low <= 0:
        low = high * 10.0 ** (-LOW_END_DECADES)
        notes.append(f"the range starts at 0 Hz; the grid starts at {low:.6g} Hz "
                     f"({LOW_END_DECADES:g} decades below its top)")
    if not (0 < low < high):
        notes.append(f"no grid: start {low:.6g} Hz is not below the top {high:.6g} Hz")
        return [], "grid", None
    if cfg.spacing == "linear":
        pts = int(cfg.points or 2)
        return list(np.linspace(low, high, pts)), "grid", (high - low) / (pts - 1)
    ppd = int(cfg.points_per_decade or 12)
    count = int(math.floor(ppd * math.log10(high / low) + 1e-9))
    return list(low * 10.0 ** (np.arange(count + 1) / ppd)), "grid", low * (10.0 ** (1.0 / ppd) - 1.0)


def request_frequencies(profile, top_hz: float, *, min_hz: float = 0.0) -> _Requests:
    """Collect the frequencies a profile asks for (see the module docstring).

    Parameters
    ----------
    profile : harness.profile.Profile
    top_hz : float
        Highest frequency the station can excite with the chosen method (inclusive).
    min_hz : float
        Lowest frequency the method can excite (exclusive lower bound, normally 0).

    Returns
    -------
    _Requests
        Requests with their allowed intervals, the uncovered frequencies and notes.
    """
    cfg = profile.stimulus
    mask = profile.mask
    notes: list[str] = []
    uncovered: list[float] = []
    pts: list[FrequencyRequest] = []

    def excitable(f: float) -> bool:
        return min_hz < f <= top_hz

    grid, kind, spacing = _grid(cfg, mask, top_hz, notes)
    for f in grid:
        if excitable(f):
            pts.append(FrequencyRequest(f, min_hz, top_hz, kind, kind))
        elif kind == "listed":
            uncovered.append(float(f))
    grid_low = min((p.target_hz for p in pts), default=None)

    widths: list[float] = []
    for i, b in enumerate(mask.bands):
        name = f"band[{i}]" + (f" ({b.label})" if b.label else "")
        lo, hi = max(b.start_hz, min_hz), min(b.stop_hz, top_hz)
        if not lo < hi:
            for f in (b.start_hz, b.stop_hz):
                if not excitable(f):
                    uncovered.append(float(f))
            notes.append(f"{name} {b.start_hz:.6g}..{b.stop_hz:.6g} Hz lies outside what the station "
                         f"can excite; not measured")
            continue
        widths.append(hi - lo)
        # lower edge
        if excitable(b.start_hz):
            pts.append(FrequencyRequest(b.start_hz, lo, hi, "edge", f"{name} start"))
        else:
            uncovered.append(float(b.start_hz))
            tgt = min(grid_low, hi) if (grid_low is not None and grid_low > lo) else lo
            pts.append(FrequencyRequest(tgt, lo, hi, "edge", f"{name} start (clamped to the station's range)"))
            notes.append(f"{name} starts at {b.start_hz:.6g} Hz, which the station cannot excite; "
                         f"measured from {tgt:.6g} Hz")
        # upper edge
        if excitable(b.stop_hz):
            pts.append(FrequencyRequest(b.stop_hz, lo, hi, "edge", f"{name} stop"))
        else:
            uncovered.append(float(b.stop_hz))
            pts.append(FrequencyRequest(hi, lo, hi, "edge", f"{name} stop (clamped to the station's range)"))
            notes.append(f"{name} ends at {b.stop_hz:.6g} Hz, beyond what the station can excite; "
                         f"measured up to {hi:.6g} Hz")
        for line in (b.upper, b.lower):
            if line is None:
                continue
            for f in line.freq_hz:
                if not (b.start_hz <= f <= b.stop_hz):
                    continue
                if excitable(f):
                    pts.append(FrequencyRequest(float(f), lo, hi, "edge", f"{name} limit point"))
                else:
                    uncovered.append(float(f))
    for line in (mask.phase.upper, mask.phase.lower):
        if line is None:
            continue
        for f in line.freq_hz:
            if excitable(f):
                pts.append(FrequencyRequest(float(f), min_hz, top_hz, "edge", "phase limit point"))
            else:
                uncovered.append(float(f))

    ref = mask.reference_hz
    if ref is not None:
        if not excitable(ref):
            raise ConfigError(profile.path, "profile.reference_hz",
                              f"{ref:g} Hz cannot be excited by this station (usable up to {top_hz:.6g} Hz); "
                              "gains relative to it cannot be measured")
        holder = [b for b in mask.bands if b.kind in ("pass", "limits") and b.covers(ref)]
        lo, hi = min_hz, top_hz
        if holder:
            lo, hi = max(holder[0].start_hz, min_hz), min(holder[0].stop_hz, top_hz)
        pts.append(FrequencyRequest(float(ref), lo, hi, "reference", "reference"))

    if not pts:
        raise ConfigError(profile.path, "stimulus",
                          f"no frequency of this profile can be excited by the station (usable range "
                          f"up to {top_hz:.6g} Hz)")
    pts = _merge_same_target(pts)
    lowest = min(p.target_hz for p in pts)
    unc = sorted(set(float(u) for u in uncovered))
    return _Requests(pts, unc, notes, lowest, widths, spacing)


def _merge_same_target(pts: list[FrequencyRequest]) -> list[FrequencyRequest]:
    """Requests for the same frequency (within 1e-9 relative) become one, with the
    highest-priority kind and the narrower interval, when one interval holds the other
    (the shared edge of two adjacent bands stays two requests, one inside each band)."""
    out: list[FrequencyRequest] = []
    for r in sorted(pts, key=lambda r: (r.target_hz, _PRIORITY[r.kind])):
        merged = False
        for j in range(len(out) - 1, -1, -1):
            a = out[j]
            if abs(a.target_hz - r.target_hz) > 1e-9 * r.target_hz:
                break
            if a.lo_hz <= r.lo_hz and r.hi_hz <= a.hi_hz:
                out[j] = FrequencyRequest(a.target_hz, r.lo_hz, r.hi_hz, a.kind, a.label)
                merged = True
                break
            if r.lo_hz <= a.lo_hz and a.hi_hz <= r.hi_hz:
                merged = True
                break
        if not merged:
            out.append(r)
    return out


# ======================================================================================
# plans
# ======================================================================================
@dataclass(eq=False)
class _PlanBase:
    sample_rate_hz: float
    freq_hz: np.ndarray
    amplitudes: np.ndarray
    phases_rad: np.ndarray
    level_dbfs: float
    requested_hz: np.ndarray
    point_kind: list
    point_label: list
    uncovered_hz: list
    notes: list

    method = "base"

    # -- to be provided by subclasses --------------------------------------------------
    def signal(self) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _samples_per_point(self) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    # -- shared --------------------------------------------------------------------------
    @property
    def n_samples(self) -> int:
        return int(self.signal().size)

    @property
    def duration_s(self) -> float:
        """Length of the played signal, seconds."""
        return self.n_samples / float(self.sample_rate_hz)

    @property
    def crest_factor_db(self) -> float:
        return 20.0 * math.log10(self.crest_factor)

    def extra_samples(self, max_latency_samples: int = 4096, *, max_clock_ppm: float = DEFAULT_MAX_CLOCK_PPM) -> int:
        """Samples to capture beyond the signal: the stream latency, plus the stretch of
        the signal by a capture clock up to `max_clock_ppm` fast, plus a margin of 32."""
        stretch = math.ceil(abs(max_clock_ppm) * 1e-6 * self.n_samples)
        return int(max(0, int(max_latency_samples)) + stretch + 32)

    def report(self, noise_dbfs_rms: float, *, reference_noise_dbfs_rms: float | None = None,
               gain_db=0.0) -> dict:
        """What the plan will achieve, before it runs.

        Uses the Cramer-Rao relations for a tone of amplitude ``A`` in white Gaussian
        noise of variance ``sigma**2`` over ``N`` samples (Rife & Boorstyn 1974; Kay
        1993): with ``SNR = A**2 / (2 sigma**2)``, ``sigma_A / A = sigma_phi =
        1/sqrt(N SNR)``, so ``u_gain_db = 8.686 / sqrt(N SNR)`` and
        ``u_phase_deg = 57.30 / sqrt(N SNR)``. ``N`` is every sample that enters a
        point (all measured periods of a multitone; all blocks of a stepped-sine step).
        For a ratio with a noisy reference channel the relative variances add (about
        sqrt(2) worse for equal noise).

        Assumptions: white noise of the given RMS on the response (and on the
        reference, if given), a response tone of the stimulus amplitude times
        ``10**(gain_db/20)``, a linear device, no clock offset.

        Parameters
        ----------
        noise_dbfs_rms : float
            RMS of the white noise on the response, dBFS (1.0 RMS = 0 dBFS).
        reference_noise_dbfs_rms : float, optional
            Same for a reference channel; None when the stimulus is known digitally.
        gain_db : float or array_like
            Assumed device gain (scalar or one per point), dB.

        Returns
        -------
        dict
            ``method``, ``duration_s``, ``crest_factor``, ``crest_factor_db``,
            ``freq_hz``, ``samples_per_point``, ``snr_db`` (per sample, A^2/(2 sigma^2)),
            ``u_gain_db``, ``u_phase_deg``, ``uncovered_hz``, ``assumptions``.
        """
        sigma = 10.0 ** (noise_dbfs_rms / 20.0)
        n = self._samples_per_point().astype(float)
        amp_y = self.amplitudes * 10.0 ** (np.asarray(gain_db, dtype=float) / 20.0)
        snr_y = amp_y ** 2 / (2.0 * sigma ** 2)
        rel_var = 1.0 / (n * snr_y)
        if reference_noise_dbfs_rms is not None:
            sigma_u = 10.0 ** (reference_noise_dbfs_rms / 20.0)
            rel_var = rel_var + 1.0 / (n * self.amplitudes ** 2 / (2.0 * sigma_u ** 2))
        rel = np.sqrt(rel_var)
        return {
            "method": self.method,
            "duration_s": self.duration_s,
            "crest_factor": self.crest_factor,
            "crest_factor_db": self.crest_factor_db,
            "freq_hz": [float(f) for f in self.freq_hz],
            "samples_per_point": [int(v) for v in n],
            "snr_db": [float(v) for v in 10.0 * np.log10(snr_y * np.ones_like(n))],
            "u_gain_db": [float(v) for v in 20.0 / math.log(10.0) * rel],
            "u_phase_deg": [float(v) for v in np.degrees(rel)],
            "uncovered_hz": [float(f) for f in self.uncovered_hz],
            "assumptions": ("white Gaussian noise of the stated RMS on the response"
                            + (" and the reference" if reference_noise_dbfs_rms is not None else
                               "; stimulus known digitally (no reference noise)")
                            + "; response amplitude = stimulus amplitude x the assumed gain; linear device; "
                              "no clock offset; Cramer-Rao bound (Rife & Boorstyn 1974, Kay 1993)"),
        }


@dataclass(eq=False)
class MultitonePlan(_PlanBase):
    """A periodic multitone on exact FFT bins.

    The period holds ``sum_k a_k cos(2 pi b_k n / N + phi_k)`` for ``n = 0..N-1`` with
    ``N = period_samples`` and bins ``b_k``; every tone completes a whole number of
    cycles per period, so a per-period FFT sees each tone on one bin with no leakage.
    ``signal()`` is ``transient_periods + periods`` copies of it.

    Attributes
    ----------
    bins : ndarray of int
        Excited bins, ascending.
    freq_hz : ndarray
        ``bins * sample_rate_hz / period_samples``.
    amplitudes : ndarray
        Tone amplitudes, full-scale units (equal for all tones).
    phases_rad : ndarray
        Tone phases at ``n = 0`` of each period, rad.
    noise_bins : ndarray of int
        Non-excited bins in ``1..N/2-1``: where noise and distortion are observed.
    unexcited_lines : bool
        True when the design keeps lines free for distortion (see `multitone_plan`).
    phase_method : str
        Which phase design gave the lowest crest factor.
    true_peak_dbfs : float
        Peak of the band-limited waveform between samples (4x oversampled), dBFS.
    """

    period_samples: int = 0
    periods: int = 8
    transient_periods: int = 2
    bins: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    noise_bins: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    unexcited_lines: bool = True
    phase_method: str = "schroeder"
    settle_s: float = 0.0
    true_peak_dbfs: float = float("nan")
    _period: np.ndarray | None = field(default=None, repr=False)

    method = "multitone"

    def signal_period(self) -> np.ndarray:
        """One period, ``period_samples`` samples (a copy)."""
        if self._period is None:
            self._period = _synth(self.bins, self.amplitudes, self.phases_rad, self.period_samples)
        return self._period.copy()

    def signal(self) -> np.ndarray:
        """The full played signal: ``transient_periods`` then ``periods`` periods."""
        return np.tile(self.signal_period(), self.transient_periods + self.periods)

    @property
    def n_samples(self) -> int:
        return int(self.period_samples * (self.transient_periods + self.periods))

    @property
    def crest_factor(self) -> float:
        """Crest factor (peak/RMS) of the played samples, linear."""
        return crest_factor(self.signal_period())

    @property
    def measured_start(self) -> int:
        """Index in the played signal where the measured periods begin."""
        return int(self.transient_periods * self.period_samples)

    def stimulus_spectrum(self) -> np.ndarray:
        """DFT of one played period at the excited bins (``rfft(period)[bins]``)."""
        return np.fft.rfft(self.signal_period())[self.bins]

    def _samples_per_point(self) -> np.ndarray:
        return np.full(self.bins.size, self.periods * self.period_samples)


@dataclass(eq=False)
class SteppedSinePlan(_PlanBase):
    """One tone after another, each an exact whole number of cycles.

    Step ``k`` plays ``settle_samples + blocks * block_samples[k]`` samples of
    ``amplitude * sin(2 pi cycles_per_block[k] * i / block_samples[k])`` (``i`` counted
    from the step start, so each step starts at a zero crossing). The capture segment is
    the last ``blocks * block_samples[k]`` samples: ``blocks`` blocks of exactly
    ``cycles_per_block[k]`` whole cycles, so ``freq_hz[k] = cycles_per_block[k] *
    sample_rate_hz / block_samples[k]`` exactly. The tone is ``amplitude *
    cos(2 pi f_k i / fs + phases_rad[k])`` in terms of the GLOBAL sample index ``i``.

    Attributes
    ----------
    segments : list of (int, int)
        ``(start, stop)`` sample indices of each capture segment in ``signal()``.
    step_starts : ndarray of int
        Index where each step (settling part included) starts.
    cycles_per_block, block_samples : ndarray of int
    blocks : int
        Blocks per segment (sub-blocks for the Type A scatter).
    settle_samples : int
    amplitude : float
    """

    blocks: int = 8
    cycles_per_block: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    block_samples: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    settle_samples: int = 0
    amplitude: float = 0.0
    step_starts: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    segments: list = field(default_factory=list)
    settle_s: float = 0.0
    _signal: np.ndarray | None = field(default=None, repr=False)

    method = "stepped-sine"

    @property
    def n_samples(self) -> int:
        if not self.segments:
            return 0
        return int(self.segments[-1][1])

    def signal(self) -> np.ndarray:
        """The full played signal (a copy)."""
        if self._signal is None:
            out = np.zeros(self.n_samples)
            for k, (start, stop) in enumerate(zip(self.step_starts, [s[1] for s in self.segments])):
                c, m = int(self.cycles_per_block[k]), int(self.block_samples[k])
                i = np.arange(stop - start, dtype=np.int64)
                # exact integer phase: 2 pi (c i mod m) / m
                out[start:stop] = self.amplitude * np.sin(2.0 * np.pi * ((c * i) % m) / m)
            self._signal = out
        return self._signal.copy()

    @property
    def crest_factor(self) -> float:
        """Crest factor (peak/RMS) of the played samples, linear (about sqrt(2))."""
        return crest_factor(self.signal())

    def _samples_per_point(self) -> np.ndarray:
        return self.blocks * np.asarray(self.block_samples, dtype=np.int64)


# ======================================================================================
# building plans
# ======================================================================================
def _choose_period(fs: float, lowest_hz: float, widths_hz: list[float], settle_s: float,
                   transient_periods: int, unexcited: bool, notes: list[str],
                   grid_spacing_hz: float | None = None) -> int:
    """Automatic multitone period (samples).

    The bin spacing ``df = fs/N`` must satisfy

    * ``df <= lowest_hz / LOW_TONE_MIN_BIN``: the lowest tone lies at least 8 bins above
      DC, with non-excited lines on both sides;
    * ``df <= w / 4`` (``w / 2`` without unexcited lines) for the narrowest band: every
      band holds at least two usable bins, so both of its edges are measured inside it;
    * ``df <= s / 4`` (``s / 2``) for the grid spacing ``s`` at its low end, so
      neighbouring grid points get distinct tones with a free line between them - but
      this rule may lengthen the period to at most GRID_PERIOD_CAP_S;

    and the settling time must fit in the discarded periods:
    ``N * max(transient_periods, 1) >= settle_s * fs``. ``N`` is the next fast FFT size
    (5-smooth, even) at or above the largest requirement and at least
    ``MIN_PERIOD_SAMPLES``, capped at ``MAX_AUTO_PERIOD_SAMPLES`` (with a note). Grid
    points closer than the resulting tone spacing at the low end are merged.
    """
    per_band = 4.0 if unexcited else 2.0
    df = lowest_hz / LOW_TONE_MIN_BIN
    if widths_hz:
        df = min(df, min(widths_hz) / per_band)
    n_req = max(fs / df, settle_s * fs / max(transient_periods, 1), MIN_PERIOD_SAMPLES)
    if grid_spacing_hz:
        n_req = max(n_req, min(fs * per_band / grid_spacing_hz, GRID_PERIOD_CAP_S * fs))
    n = int(scipy.fft.next_fast_len(int(math.ceil(n_req)), real=True))
    while n % 2:
        n = int(scipy.fft.next_fast_len(n + 1, real=True))
    if n > MAX_AUTO_PERIOD_SAMPLES:
        notes.append(f"the mask asks for a {n}-sample period; capped at {MAX_AUTO_PERIOD_SAMPLES} "
                     f"(low tones or narrow bands are resolved more coarsely; consider stepped-sine)")
        n = MAX_AUTO_PERIOD_SAMPLES
    return n


def _select(points: list[tuple[int, FrequencyRequest]], min_gap: int) -> list[tuple[int, FrequencyRequest]]:
    """Merge points that share a bin (or frequency index), keeping higher priority first;
    grid points also keep `min_gap` from every accepted point."""
    order = sorted(points, key=lambda p: (_PRIORITY[p[1].kind], p[0]))
    taken: dict[int, FrequencyRequest] = {}
    for b, req in order:
        if b in taken:
            continue
        if req.kind == "grid" and min_gap > 1 and taken:
            keys = np.fromiter(taken.keys(), dtype=np.int64)
            if np.min(np.abs(keys - b)) < min_gap:
                continue
        taken[b] = req
    return sorted(taken.items())


def multitone_plan(requests: list[FrequencyRequest], sample_rate_hz: float, *, level_dbfs: float = -12.0,
                   periods: int = 8, transient_periods: int = 2, period_samples: int | None = None,
                   unexcited_lines: bool = True, settle_s: float = 0.0, band_widths_hz=(),
                   uncovered_hz=(), notes=(), optimize_phases: bool = True) -> MultitonePlan:
    """Build a multitone plan from frequency requests.

    Excitation design with ``unexcited_lines`` (default): tones only on ODD bins, and
    neighbouring grid tones at least 4 bins apart. Then every even-order product of the
    tones (``b_i +- b_j``, ``2 b_i``) falls on an EVEN bin, which is never excited, and
    odd-order products of neighbouring tones (``2 b_i - b_j``...) fall on odd bins, some
    of which stay empty between neighbouring tones; noise and distortion are observed on
    all non-excited bins (`MultitonePlan.noise_bins`). Without it, tones may use any bin.

    Parameters
    ----------
    requests : list of FrequencyRequest
        Wanted frequencies with their allowed intervals (see `request_frequencies`).
        A plain list of floats is also accepted (each may move to any bin).
    sample_rate_hz : float
        Station sample rate, Hz.
    level_dbfs : float
        PEAK level of the generated samples, dBFS; the tone amplitude follows from the
        crest factor. (The phases are optimised on a 2x finer grid, so the peaks between
        samples stay close; `MultitonePlan.true_peak_dbfs` reports the 4x-oversampled
        peak of the band-limited waveform.)
    periods, transient_periods : int
        Measured periods, and periods played and discarded first (settling).
    period_samples : int, optional
        Period length; default chosen by `_choose_period`.
    unexcited_lines : bool
        See above.
    settle_s : float
        Settling time the discarded periods must cover (for the automatic period).
    band_widths_hz : sequence of float
        Band widths that the resolution must resolve (for the automatic period).
    uncovered_hz, notes : sequence
        Carried into the plan (from `request_frequencies`).
    optimize_phases : bool
        Run `reduce_crest_factor` after Schroeder's phases (default True).

    Returns
    -------
    MultitonePlan
    """
    fs = float(sample_rate_hz)
    notes = list(notes)
    uncovered = list(uncovered_hz)
    reqs = [r if isinstance(r, FrequencyRequest) else FrequencyRequest(float(r), 0.0, fs / 2, "listed", "listed")
            for r in requests]
    if not reqs:
        raise ValueError("a multitone needs at least one frequency")
    if periods < 1 or transient_periods < 0:
        raise ValueError("periods must be >= 1 and transient_periods >= 0")
    lowest = min(r.target_hz for r in reqs if r.target_hz > 0)
    if period_samples is None:
        n = _choose_period(fs, lowest, list(band_widths_hz), settle_s, transient_periods, unexcited_lines, notes)
    else:
        n = int(period_samples)
        if n < 16 or n % 2:
            raise ValueError("period_samples must be even and >= 16")
    top_bin = n // 2 - 1
    if unexcited_lines and top_bin % 2 == 0:
        top_bin -= 1
    df = fs / n
    step = 2 if unexcited_lines else 1
    chosen: list[tuple[int, FrequencyRequest]] = []
    for r in reqs:
        lo_b = max(1, int(math.ceil(r.lo_hz / df - 1e-9)))
        hi_b = min(top_bin, int(math.floor(r.hi_hz / df + 1e-9)))
        if unexcited_lines:
            lo_b += 1 - lo_b % 2
            hi_b -= 1 - hi_b % 2
        if r.target_hz > top_bin * df * (1 + 1e-12) and r.kind in ("listed", "grid"):
            uncovered.append(float(r.target_hz))
            continue
        if lo_b > hi_b:
            uncovered.append(float(r.target_hz))
            notes.append(f"{r.label} at {r.target_hz:.6g} Hz: no usable bin inside "
                         f"{r.lo_hz:.6g}..{r.hi_hz:.6g} Hz at {df:.6g} Hz spacing; not measured")
            continue
        b = int(round((r.target_hz / df - lo_b) / step)) * step + lo_b
        b = int(min(max(b, lo_b), hi_b))
        chosen.append((b, r))
    sel = _select(chosen, 4 if unexcited_lines else 1)
    if not sel:
        raise ValueError("no frequency could be placed on a bin")
    bins = np.array([b for b, _ in sel], dtype=np.int64)
    kinds = [r.kind for _, r in sel]
    labels = [r.label for _, r in sel]
    req_hz = np.array([r.target_hz for _, r in sel])
    merged = len(chosen) - len(sel)
    if merged:
        gap = 4 if unexcited_lines else 1
        notes.append(f"{merged} requested point(s) shared a bin or lay closer than {gap} bin(s) "
                     f"({gap * df:.4g} Hz) to another point and were merged")

    amp_rel = np.ones(bins.size)
    phases = schroeder_phases(bins.size)
    method = "schroeder"
    if optimize_phases and bins.size >= 3:
        phases, method = reduce_crest_factor(bins, amp_rel, phases, n)
    phases = np.angle(np.exp(1j * phases))
    unit = _synth(bins, amp_rel, phases, n)
    peak = float(np.max(np.abs(unit)))
    amp = amp_rel * (10.0 ** (level_dbfs / 20.0) / peak)
    true_peak_dbfs = level_dbfs + 20.0 * math.log10(_true_peak(unit) / peak)
    if true_peak_dbfs > level_dbfs + 0.5:
        notes.append(f"the band-limited waveform peaks at {true_peak_dbfs:.2f} dBFS between samples "
                     f"(sample peak {level_dbfs:.2f} dBFS): tones close to Nyquist")
    mask_bins = np.ones(n // 2 + 1, dtype=bool)
    mask_bins[[0, n // 2]] = False
    mask_bins[bins] = False
    noise_bins = np.flatnonzero(mask_bins).astype(np.int64)
    return MultitonePlan(
        sample_rate_hz=fs, freq_hz=bins * df, amplitudes=amp, phases_rad=phases, level_dbfs=float(level_dbfs),
        requested_hz=req_hz, point_kind=kinds, point_label=labels,
        uncovered_hz=sorted(set(float(u) for u in uncovered)), notes=notes,
        period_samples=n, periods=int(periods), transient_periods=int(transient_periods), bins=bins,
        noise_bins=noise_bins, unexcited_lines=bool(unexcited_lines), phase_method=method, settle_s=float(settle_s),
        true_peak_dbfs=float(true_peak_dbfs))


def _realize(req: FrequencyRequest, fs: float, c_min: int, m_min: int) -> tuple[int, int] | None:
    """Whole cycles ``c`` in ``m`` samples with ``c*fs/m`` close to the target and inside
    the request's interval: the smallest ``c >= c_min`` (with ``m >= m_min``) within
    STEPPED_FREQ_TOL of the target, else the closest found for ``c`` up to
    ``2*c_min + 4096``. None when no candidate lies inside the interval."""
    f = req.target_hz
    c = np.arange(c_min, 2 * c_min + 4097, dtype=np.int64)
    base = np.rint(c * fs / f).astype(np.int64)
    cc = np.concatenate([c, c, c])
    mm = np.concatenate([base, base - 1, base + 1])
    ok = mm >= np.maximum(m_min, 2 * cc + 1)
    fr = cc * fs / np.maximum(mm, 1)
    ok &= (fr >= req.lo_hz * (1 - 1e-12)) & (fr <= req.hi_hz * (1 + 1e-12)) & (fr < fs / 2)
    if not np.any(ok):
        return None
    err = np.where(ok, np.abs(fr - f) / f, np.inf)
    good = np.flatnonzero(err <= STEPPED_FREQ_TOL)
    if good.size:
        j = good[np.lexsort((err[good], cc[good]))[0]]
    else:
        j = int(np.argmin(err))
    return int(cc[j]), int(mm[j])


def stepped_sine_plan(requests: list[FrequencyRequest], sample_rate_hz: float, *, level_dbfs: float = -12.0,
                      blocks: int = 8, cycles: int = 16, min_tone_s: float = 0.01, settle_s: float = 0.01,
                      uncovered_hz=(), notes=()) -> SteppedSinePlan:
    """Build a stepped-sine plan from frequency requests.

    Per frequency ``f``: ``c`` whole cycles in ``m`` samples per block, ``blocks``
    blocks per capture segment, with ``blocks * c >= cycles`` and
    ``blocks * m >= min_tone_s * fs`` (both REFERENCE_LENGTH_FACTOR times more for the
    point of kind "reference", since every relative gain carries its uncertainty); the
    frequency is adjusted to ``c * fs / m`` (within STEPPED_FREQ_TOL relative where
    possible, always inside the request's interval) and reported. Before each segment the tone plays for ``settle_s``.
    The level is the sine's peak: ``amplitude = 10**(level_dbfs/20)``.

    Parameters
    ----------
    requests : list of FrequencyRequest or float
    sample_rate_hz : float
    level_dbfs : float
    blocks : int
        Blocks per segment (>= 2; their scatter gives the Type A uncertainty).
    cycles : int
        Minimum whole cycles per segment.
    min_tone_s : float
        Minimum segment duration, s.
    settle_s : float
        Settling time before each segment, s.
    uncovered_hz, notes : sequence

    Returns
    -------
    SteppedSinePlan
    """
    fs = float(sample_rate_hz)
    if blocks < 2:
        raise ValueError("blocks must be >= 2")
    notes = list(notes)
    uncovered = list(uncovered_hz)
    top = STEPPED_TOP_FRACTION * fs / 2
    reqs = [r if isinstance(r, FrequencyRequest) else FrequencyRequest(float(r), 0.0, top, "listed", "listed")
            for r in requests]
    chosen = []
    for r in reqs:
        if not (0 < r.target_hz <= top):
            uncovered.append(float(r.target_hz))
            continue
        # the reference frequency is measured REFERENCE_LENGTH_FACTOR times longer:
        # every gain relative to it carries its uncertainty
        f_len = REFERENCE_LENGTH_FACTOR if r.kind == "reference" else 1
        c_min = max(1, math.ceil(f_len * cycles / blocks), math.ceil(f_len * min_tone_s * r.target_hz / blocks - 1e-9))
        m_min = math.ceil(f_len * min_tone_s * fs / blocks - 1e-9)
        cm = _realize(FrequencyRequest(r.target_hz, r.lo_hz, min(r.hi_hz, top), r.kind, r.label), fs, c_min, m_min)
        if cm is None:
            uncovered.append(float(r.target_hz))
            notes.append(f"{r.label} at {r.target_hz:.6g} Hz could not be realised inside "
                         f"{r.lo_hz:.6g}..{r.hi_hz:.6g} Hz; not measured")
            continue
        chosen.append((cm, r))
    # merge equal realised frequencies (keep priority)
    by_freq: dict[tuple[int, int], tuple[tuple[int, int], FrequencyRequest]] = {}
    for (c, m), r in sorted(chosen, key=lambda t: _PRIORITY[t[1].kind]):
        g = math.gcd(c, m)
        key = (c // g, m // g)
        if key not in by_freq:
            by_freq[key] = ((c, m), r)
    items = sorted(by_freq.values(), key=lambda t: t[0][0] / t[0][1])
    if not items:
        raise ValueError("no frequency could be realised")
    if len(items) < len(chosen):
        notes.append(f"{len(chosen) - len(items)} requested point(s) realised the same frequency and were merged")
    settle_n = int(math.ceil(settle_s * fs))
    amp = 10.0 ** (level_dbfs / 20.0)
    c_arr = np.array([cm[0] for cm, _ in items], dtype=np.int64)
    m_arr = np.array([cm[1] for cm, _ in items], dtype=np.int64)
    freq = c_arr * fs / m_arr
    starts, segs, phases = [], [], []
    pos = 0
    for c, m in zip(c_arr, m_arr):
        starts.append(pos)
        seg_start = pos + settle_n
        seg_stop = seg_start + blocks * int(m)
        segs.append((int(seg_start), int(seg_stop)))
        # sin(2 pi c (i - pos)/m) = cos(2 pi c i/m + phi) with phi = -2 pi c pos/m - pi/2
        phases.append(float(np.angle(np.exp(1j * (-2.0 * np.pi * ((int(c) * pos) % int(m)) / int(m) - np.pi / 2)))))
        pos = seg_stop
    return SteppedSinePlan(
        sample_rate_hz=fs, freq_hz=freq, amplitudes=np.full(freq.size, amp), phases_rad=np.array(phases),
        level_dbfs=float(level_dbfs), requested_hz=np.array([r.target_hz for _, r in items]),
        point_kind=[r.kind for _, r in items], point_label=[r.label for _, r in items],
        uncovered_hz=sorted(set(float(u) for u in uncovered)), notes=notes, blocks=int(blocks),
        cycles_per_block=c_arr, block_samples=m_arr, settle_samples=settle_n, amplitude=amp,
        step_starts=np.array(starts, dtype=np.int64), segments=segs, settle_s=float(settle_s))


def plan_for_profile(profile, sample_rate_hz: float) -> MultitonePlan | SteppedSinePlan:
    """The stimulus plan a profile asks for on a station running at `sample_rate_hz`.

    The method, grid, level, periods and settling come from ``profile.stimulus``
    (`harness.profile.StimulusConfig`); the frequency set adds the mask's edges and
    reference (module docstring). The settling time is ``settle_s`` when given, else
    `derived_settle_s` of the mask.

    Raises
    ------
    harness.errors.ConfigError
        When nothing of the profile can be excited at this sample rate, or its reference
        frequency cannot.
    """
    fs = float(sample_rate_hz)
    if not fs > 0:
        raise ConfigError(profile.path, "station.sample_rate_hz", f"must be > 0, got {sample_rate_hz!r}")
    cfg = profile.stimulus
    if cfg.method == "stepped-sine":
        top = STEPPED_TOP_FRACTION * fs / 2
        req = request_frequencies(profile, top)
        settle = cfg.settle_s if cfg.settle_s is not None else derived_settle_s(profile.mask, req.lowest_hz)
        notes = req.notes + [f"settling {settle * 1e3:.4g} ms before each tone"
                             + ("" if cfg.settle_s is not None else " (derived from the mask's narrowest width)")]
        try:
            return stepped_sine_plan(req.points, fs, level_dbfs=cfg.level_dbfs, blocks=max(2, cfg.periods),
                                     cycles=cfg.cycles, min_tone_s=cfg.min_tone_s, settle_s=settle,
                                     uncovered_hz=req.uncovered_hz, notes=notes)
        except ValueError as exc:
            raise ConfigError(profile.path, "stimulus", str(exc)) from None
    # multitone: the top bin depends on the period; request with the Nyquist bound first
    req0 = request_frequencies(profile, fs / 2 * (1 - 1e-9))
    settle = cfg.settle_s if cfg.settle_s is not None else derived_settle_s(profile.mask, req0.lowest_hz)
    n = cfg.period_samples
    notes0: list[str] = []
    if n is None:
        n = _choose_period(fs, req0.lowest_hz, req0.band_widths_hz, settle, cfg.transient_periods,
                           cfg.unexcited_lines, notes0, req0.grid_spacing_hz)
    elif n % 2:
        raise ConfigError(profile.path, "stimulus.period_samples", f"must be even, got {n}")
    top = (n // 2 - 1) * fs / n
    req = request_frequencies(profile, top)
    try:
        return multitone_plan(req.points, fs, level_dbfs=cfg.level_dbfs, periods=cfg.periods,
                              transient_periods=cfg.transient_periods, period_samples=n,
                              unexcited_lines=cfg.unexcited_lines, settle_s=settle,
                              uncovered_hz=req.uncovered_hz, notes=req.notes + notes0)
    except ValueError as exc:
        raise ConfigError(profile.path, "stimulus", str(exc)) from None
