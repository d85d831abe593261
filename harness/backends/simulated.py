"""A simulated board under test behind the `harness.backends.base.Backend` interface.

`SimulatedBoard` plays a stimulus through a `harness.device.DeviceModel` and captures
the result the way an audio interface with a reference input would: deterministic for a
seed, with the board's filter, imperfections and faults, the interface's own noise floor
and full-scale clipping, its stream latency and an optional clock offset.

Signal chain of one ``play_and_capture`` (all rates are the station rate fs unless said):

1. Played signal: the stimulus, then ``extra_samples`` of silence, saturated at +-1
   (the interface's output clips at full scale; it refuses nothing, the station enforces
   its maximum level).
2. Clock offset: the capture clock runs at ``fs * (1 + ppm * 1e-6)``. The whole played
   signal is resampled onto the capture clock by band-limited interpolation (the same
   Kaiser-windowed sinc as the fractional delay below, evaluated at each capture
   instant ``k / (1 + ppm * 1e-6)`` playback samples). Everything after this step,
   the board included, runs on the capture clock, so a tone of f Hz appears at
   ``f / (1 + ppm * 1e-6)`` Hz in the capture and frequencies in `true_response` are on
   the capture clock's axis (they coincide with the playback axis when ppm = 0).
3. The board: input noise; the filter (digital: scipy.signal.sosfilt at fs; analog: see
   below); gain error; its own latency (whole + fractional samples); the static
   nonlinearity ``y + k y**3``; mains hum, output noise and DC offset; clipping at
   +-clip_level. Faults replace this output: ``open`` none, ``short`` stuck at the
   negative rail (-clip_level, or -1 without one), ``dead`` its noise only (output
   noise, or `DEAD_NOISE_DBFS` when the model gives none, plus hum and DC offset).
4. The interface: stream latency (``chain_latency_samples``) on both inputs, capture
   noise `CAPTURE_NOISE_DBFS` on both inputs, saturation at +-1 (the ADC).
5. Dropout: ``dropout_samples`` samples at ``dropout_at_s`` are lost from both inputs;
   later samples shift earlier and the tail is what the stream delivered next (the
   simulation runs that much longer). Not reported in the metadata: the harness must
   detect it. A capture shorter than ``dropout_at_s`` has no dropout.

Analog filters
--------------
The analog prototype (zpk in rad/s) is simulated at an oversampled rate ``U * fs``:
interpolate by U in two polyphase stages (scipy.signal.upfirdn; x2 with a Kaiser FIR
passing 0..0.45 fs and stopping from 0.5 fs at 120 dB, then x U/2 passing 0..0.5 fs and
stopping from 1.5 fs), filter with the bilinear transform (prewarped, see below),
decimate back through the same two stages.
The resampling FIRs are linear phase with their delays removed, so they contribute a
real (zero-phase) factor, and their stopbands start where images and aliases would
land, so for any sine below fs/2 the response is exactly ``A(f)**2 B(f)**2
H_bilinear(f)`` (up to the 120 dB stopbands), which `true_response` computes from the
FIR taps and scipy.signal.sosfreqz.

The residual vs the ideal analog response (scipy.signal.freqs_zpk) over 0..0.45 fs is
bilinear frequency warping, growing as (f / (U fs))**2. U is the smallest power of two
from 8 to 128 that keeps ``max |H_true - H_ideal|`` below `ANALOG_RESIDUAL_TARGET` = 2e-3
of the peak gain (0.017 dB / 0.12 deg where the gain is near 0 dB), and the prewarp
frequency is whichever of the cutoff (band centre) and the pole frequencies inside
0.001..0.45 fs gives the smallest residual; the achieved value is
``board.analog_residual`` (a filter that misses the target even at U = 128 is still
simulated, with its larger residual reported there). Measured for the fixtures (tests/test_simulated.py): KA-200
6th-order Butterworth 18 kHz at 48 kHz, U = 32, 8.1e-4 (0.009 dB, 0.06 deg where
|H| > -20 dB); KA-210 elliptic, U = 32, 1.1e-3; KX-2 crossover, U = 16, 6.8e-4;
KU-40 40 kHz band-pass at 192 kHz, U = 16, 1.5e-3. Between 0.45 fs and fs/2 the
resampling FIRs roll the response off (-0.25 dB at 0.46 fs, -12 dB at 0.475 fs, about
-75 dB at 0.49 fs), as the decimation filters of a real converter do; `true_response`
includes that exactly. Cost: about 0.1 s of CPU per second of 48 kHz signal at U = 32.

Fractional latency
------------------
A whole-sample latency is a shift. A fractional one is a Kaiser-windowed sinc FIR
(`FRACTIONAL_DELAY_TAPS` = 128 taps, beta = 12) centred on the delay. Its cost near
Nyquist: ``|H / exp(-j w d) - 1|`` stays below 2e-6 up to 0.45 fs and the gain is
-0.00001 dB at 0.47 fs, but -1.9 dB at 0.49 fs and about -6 dB at fs/2; the simulation
looks 64 samples ahead. `true_response` uses the FIR's exact response (a DTFT of its
taps), not ``exp(-j w d)``; `ideal_response` uses ``exp(-j w d)``.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal, special

from harness.backends.base import Capture
from harness.device import DeviceModel
from harness.errors import ConfigError, InvalidMeasurement

CAPTURE_NOISE_DBFS = -130.0       # rms noise floor of each interface input (20 log10 rms)
DEAD_NOISE_DBFS = -80.0           # rms output noise of a dead board without output_noise_dbfs
FRACTIONAL_DELAY_HALF_LENGTH = 64
FRACTIONAL_DELAY_TAPS = 2 * FRACTIONAL_DELAY_HALF_LENGTH
FRACTIONAL_DELAY_BETA = 12.0
RESAMPLER_ATTENUATION_DB = 120.0
ANALOG_RESIDUAL_TARGET = 2e-3     # max |H_true - H_ideal| / max|H_ideal| over 0..0.45 fs
MIN_OVERSAMPLE = 8
MAX_OVERSAMPLE = 128


# --------------------------------------------------------------------------------------
# band-limited interpolation
def _kernel(u: np.ndarray, half_length: int = FRACTIONAL_DELAY_HALF_LENGTH,
            beta: float = FRACTIONAL_DELAY_BETA) -> np.ndarray:
    """Kaiser-windowed sinc at offsets `u` (samples); zero for ``|u| >= half_length``."""
    r = np.clip(1.0 - (np.asarray(u, float) / half_length) ** 2, 0.0, None)
    w = special.i0(beta * np.sqrt(r)) / special.i0(beta)
    return np.where(r > 0, np.sinc(u) * w, 0.0)


def _interp_at(x: np.ndarray, t: np.ndarray, half_length: int = FRACTIONAL_DELAY_HALF_LENGTH,
               chunk: int = 4096) -> np.ndarray:
    """Band-limited value of `x` at fractional sample positions `t` (zero outside x).

    Written by hand: scipy has no arbitrary-ratio resampler at fixed cost (resample_poly
    with a ratio like 1.000037 builds a filter of millions of taps).
    """
    L = half_length
    pad = np.concatenate([np.zeros(L + 1), x, np.zeros(L + 1)])
    j = np.arange(-(L - 1), L + 1)
    out = np.empty(len(t))
    for s in range(0, len(t), chunk):
        tt = t[s:s + chunk]
        n0 = np.floor(tt).astype(np.int64)
        frac = tt - n0
        idx = np.clip(n0[:, None] + j[None, :] + L + 1, 0, len(pad) - 1)
        w = _kernel(frac[:, None] - j[None, :], L)
        out[s:s + chunk] = np.sum(pad[idx] * w, axis=1)
    return out


def _shift(x: np.ndarray, n: int) -> np.ndarray:
    """Delay by `n` >= 0 whole samples, keeping the length (zeros shift in)."""
    if n <= 0:
        return x.copy()
    out = np.zeros_like(x)
    if n < len(x):
        out[n:] = x[:len(x) - n]
    return out


class _Delay:
    """Whole + fractional sample delay (see the module docstring)."""

    def __init__(self, delay_samples: float):
        self.delay = float(delay_samples)
        self.whole = int(math.floor(self.delay))
        self.frac = self.delay - self.whole
        L = FRACTIONAL_DELAY_HALF_LENGTH
        if self.frac > 1e-12:
            m = np.arange(2 * L)
            self.taps = _kernel(m - (L - 1) - self.frac)
            self.lags = m - (L - 1) + self.whole     # tap m delays by lags[m] samples
        else:
            self.frac = 0.0
            self.taps = None

    def apply(self, x: np.ndarray) -> np.ndarray:
        if self.taps is None:
            return _shift(x, self.whole)
        full = signal.oaconvolve(x, self.taps)
        start = FRACTIONAL_DELAY_HALF_LENGTH - 1 - self.whole
        if start >= 0:
            return full[start:start + len(x)]
        out = np.zeros_like(x)
        out[-start:] = full[:len(x) + start]
        return out

    def response(self, omega: np.ndarray) -> np.ndarray:
        """Exact frequency response at `omega` rad/sample."""
        if self.taps is None:
            return np.exp(-1j * omega * self.whole)
        return np.exp(-1j * np.outer(omega, self.lags)) @ self.taps


# --------------------------------------------------------------------------------------
# filter paths
class _Stage:
    """One polyphase interpolate/decimate stage with a linear-phase Kaiser FIR."""

    def __init__(self, factor: int, high_rate_hz: float, pass_hz: float, stop_hz: float):
        self.factor = factor
        self.rate = high_rate_hz
        numtaps, beta = signal.kaiserord(RESAMPLER_ATTENUATION_DB, (stop_hz - pass_hz) / (high_rate_hz / 2))
        numtaps |= 1
        self.h = signal.firwin(numtaps, (pass_hz + stop_hz) / 2, window=("kaiser", beta), fs=high_rate_hz)
        self.D = (numtaps - 1) // 2

    def up(self, x: np.ndarray) -> np.ndarray:
        y = signal.upfirdn(self.h * self.factor, x, up=self.factor)
        return y[self.D:self.D + self.factor * len(x)]

    def down(self, x: np.ndarray) -> np.ndarray:
        pad = (-self.D) % self.factor
        y = signal.upfirdn(self.h, np.concatenate([np.zeros(pad), x]), down=self.factor)
        s = (self.D + pad) // self.factor
        return y[s:s + len(x) // self.factor]

    def amplitude(self, freq_hz: np.ndarray) -> np.ndarray:
        """Zero-phase amplitude response (real) at `freq_hz`."""
        omega = 2 * np.pi * np.asarray(freq_hz, float) / self.rate
        n = np.arange(1, self.D + 1)
        return self.h[self.D] + 2.0 * np.cos(np.outer(omega, n)) @ self.h[self.D + 1:]


class _DigitalPath:
    def __init__(self, sos: np.ndarray, fs: float):
        self.sos, self.fs = sos, fs
        self.lookahead = 0

    def apply(self, x: np.ndarray) -> np.ndarray:
        return signal.sosfilt(self.sos, x)

    def response(self, freq_hz: np.ndarray) -> np.ndarray:
        return signal.sosfreqz(self.sos, worN=freq_hz, fs=self.fs)[1]


class _AnalogPath:
    def __init__(self, z, p, k, fs: float, oversample: int, prewarp_hz: float | None,
                 stages: tuple[_Stage, _Stage] | None = None):
        self.fs, self.U = fs, oversample
        fo = oversample * fs
        self.stage_a, self.stage_b = stages or (_Stage(2, 2 * fs, 0.45 * fs, 0.5 * fs),
                                                _Stage(oversample // 2, fo, 0.5 * fs, 1.5 * fs))
        beta = 1.0
        if prewarp_hz:
            w = 2 * np.pi * min(prewarp_hz, 0.45 * fs)
            beta = w / (2 * fo * np.tan(w / (2 * fo)))
        # prewarped prototype H(beta s): roots / beta, gain * beta**(nz - np)
        z2, p2 = np.asarray(z) / beta, np.asarray(p) / beta
        k2 = k * beta ** (len(z) - len(p))
        zd, pd, kd = signal.bilinear_zpk(z2, p2, k2, fo)
        self.sos = signal.zpk2sos(zd, pd, kd)
        self.prewarp_hz = prewarp_hz
        self.lookahead = 2 * (-(-self.stage_a.D // 2) + -(-self.stage_b.D // oversample)) + 4

    def apply(self, x: np.ndarray) -> np.ndarray:
        y = self.stage_b.up(self.stage_a.up(x))
        y = signal.sosfilt(self.sos, y)
        return self.stage_a.down(self.stage_b.down(y))

    def response(self, freq_hz: np.ndarray) -> np.ndarray:
        f = np.asarray(freq_hz, float)
        return self.bilinear_response(f) * self.resampler_response(f)

    def bilinear_response(self, f: np.ndarray) -> np.ndarray:
        return signal.sosfreqz(self.sos, worN=f, fs=self.U * self.fs)[1]

    def resampler_response(self, f: np.ndarray) -> np.ndarray:
        return (self.stage_a.amplitude(f) * self.stage_b.amplitude(f)) ** 2


def _residual_grid(fs: float) -> np.ndarray:
    return np.unique(np.concatenate([np.linspace(0.0, 0.45 * fs, 2048),
                                     np.geomspace(1e-4 * fs, 0.45 * fs, 512)]))


def _prewarp_candidates(p, fs: float, characteristic_hz: float | None) -> list[float]:
    """The filter's characteristic frequency and its pole frequencies inside 0.001..0.45 fs."""
    cands = [] if not characteristic_hz else [min(characteristic_hz, 0.45 * fs)]
    for f in np.unique(np.round(np.abs(np.asarray(p)) / (2 * np.pi), 6)):
        if 1e-3 * fs <= f <= 0.45 * fs and all(abs(f / c - 1) > 1e-3 for c in cands):
            cands.append(float(f))
    return cands or [0.0]


def _analog_path(z, p, k, fs: float, characteristic_hz: float | None,
                 oversample: int | None) -> tuple[_AnalogPath, float]:
    """The analog path and its residual: max ``|H_true - H_ideal|`` over 0..0.45 fs
    relative to the largest ``|H_ideal|`` there (H_ideal from scipy.signal.freqs_zpk).

    U is `oversample`, or the smallest power of two from `MIN_OVERSAMPLE` to
    `MAX_OVERSAMPLE` whose residual meets `ANALOG_RESIDUAL_TARGET`; at each U the prewarp
    frequency is the candidate (characteristic frequency, pole frequencies) with the
    smallest residual.
    """
    f = _residual_grid(fs)
    ideal = signal.freqs_zpk(z, p, k, worN=2 * np.pi * f)[1]
    peak = max(float(np.max(np.abs(ideal))), 1e-300)
    cands = _prewarp_candidates(p, fs, characteristic_hz)
    u = oversample or MIN_OVERSAMPLE
    while True:
        best: tuple[float, _AnalogPath] | None = None
        stages = None
        for c in cands:
            path = _AnalogPath(z, p, k, fs, u, c, stages)
            stages = (path.stage_a, path.stage_b)
            res = float(np.max(np.abs(path.response(f) - ideal))) / peak
            if best is None or res < best[0]:
                best = (res, path)
        if oversample is not None or best[0] <= ANALOG_RESIDUAL_TARGET or u >= MAX_OVERSAMPLE:
            return best[1], best[0]
        u *= 2


# --------------------------------------------------------------------------------------
class SimulatedBoard:
    """A simulated device under test behind the Backend interface.

    Parameters
    ----------
    device : DeviceModel
        The board (filter, imperfections, fault).
    sample_rate_hz : float
        Station sample rate (playback and nominal capture rate), Hz.
    reference_channel : bool
        Capture the played signal on a second input (`Capture.reference`).
    chain_latency_samples : int
        The interface's stream latency: delays BOTH captured channels by this many
        samples; not part of the board's response.
    seed : int, optional
        Seed of the random streams (default: the model's ``imperfections.seed``). Call
        number i of `play_and_capture` draws from ``SeedSequence([seed, i])``, so a
        board built with the same seed replays the same captures.
    analog_oversample : int, optional
        Oversampling factor of analog filter simulation (a power of two >= 4; default
        `default_oversample(sample_rate_hz)`).

    Raises
    ------
    ConfigError
        A digital filter made for another rate, hum at or above fs/2, bad arguments.
    """

    def __init__(self, device: DeviceModel, sample_rate_hz: float, *, reference_channel: bool = True,
                 chain_latency_samples: int = 0, seed: int | None = None,
                 analog_oversample: int | None = None):
        if isinstance(sample_rate_hz, bool) or not isinstance(sample_rate_hz, (int, float)) \
                or not math.isfinite(sample_rate_hz) or sample_rate_hz <= 0:
            raise ConfigError(None, "sample_rate_hz", f"must be a positive number, got {sample_rate_hz!r}")
        if isinstance(chain_latency_samples, bool) or not isinstance(chain_latency_samples, (int, np.integer)) \
                or chain_latency_samples < 0:
            raise ConfigError(None, "chain_latency_samples",
                              f"must be a whole number >= 0, got {chain_latency_samples!r}")
        self.device = device
        self.sample_rate_hz = float(sample_rate_hz)
        self.has_reference = bool(reference_channel)
        self.chain_latency_samples = int(chain_latency_samples)
        self.seed = int(device.imperfections.seed if seed is None else seed)
        self._calls = 0
        self._closed = False
        fs = self.sample_rate_hz
        imp = device.imperfections
        if imp.hum_dbfs is not None and imp.hum_hz >= fs / 2:
            raise ConfigError(device.source, "device.imperfections.hum_hz",
                              f"{imp.hum_hz:g} Hz is not below half the sample rate ({fs / 2:g} Hz)")
        if device.filter.analog:
            u = analog_oversample
            if u is not None and (isinstance(u, bool) or not isinstance(u, (int, np.integer))
                                  or u < 4 or u & (u - 1)):
                raise ConfigError(None, "analog_oversample", f"must be a power of two >= 4, got {u!r}")
            z, p, k = device.filter.analog_zpk()
            self._path, self.analog_residual = _analog_path(
                z, p, k, fs, device.filter.characteristic_hz(), None if u is None else int(u))
            self.oversample: int | None = self._path.U
        else:
            self._path = _DigitalPath(device.filter.digital_sos(fs, device.source), fs)
            self.oversample = None
            self.analog_residual: float | None = None
        self._delay = _Delay(imp.latency_samples)
        self._gain = 10.0 ** (imp.gain_error_db / 20.0)
        self._margin = self._path.lookahead + FRACTIONAL_DELAY_HALF_LENGTH + 16

    # -- Backend interface -------------------------------------------------------------
    def identity(self) -> dict:
        """Identity of the simulated path: backend, device id (the serial), model, firmware."""
        d = self.device
        return {
            "backend": "simulated",
            "serial": d.id,
            "device_id": d.id,
            "model": d.model,
            "firmware": d.firmware,
            "manufacturer": d.manufacturer,
            "device_file": d.source,
            "sample_rate_hz": self.sample_rate_hz,
            "reference_channel": self.has_reference,
            "analog_oversample": self.oversample,
        }

    def close(self) -> None:
        self._closed = True

    def __enter__(self) -> "SimulatedBoard":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def play_and_capture(self, stimulus: np.ndarray, *, extra_samples: int = 0) -> Capture:
        """Play `stimulus` through the board and capture ``len(stimulus) + extra_samples``
        samples of the response and (when present) the reference, on one clock.

        Parameters
        ----------
        stimulus : array_like, shape (n,)
            Full-scale units; beyond +-1 the interface output saturates.
        extra_samples : int
            Silence played, and captured, after the stimulus (>= 0).

        Returns
        -------
        Capture
        """
        if self._closed:
            raise InvalidMeasurement("simulated board: play_and_capture called after close()")
        x = np.asarray(stimulus, dtype=float)
        if x.ndim != 1:
            raise ValueError(f"stimulus must be one-dimensional, got shape {x.shape}")
        if not np.all(np.isfinite(x)):
            raise ValueError("stimulus contains NaN or infinite samples")
        if isinstance(extra_samples, bool) or not isinstance(extra_samples, (int, np.integer)) or extra_samples < 0:
            raise ValueError(f"extra_samples must be a whole number >= 0, got {extra_samples!r}")
        call = self._calls
        self._calls += 1
        streams = [np.random.default_rng(s) for s in np.random.SeedSequence([self.seed, call]).spawn(6)]
        rng_in, rng_out, rng_hum, rng_resp, rng_ref, rng_dead = streams

        fs = self.sample_rate_hz
        imp = self.device.imperfections
        n_out = len(x) + int(extra_samples)
        drop_at = drop_n = 0
        if imp.dropout_at_s is not None:
            drop_at = int(round(imp.dropout_at_s * fs))
            drop_n = imp.dropout_samples if drop_at < n_out else 0
        n_cap = n_out + drop_n
        n_sim = n_cap + self._margin

        played = np.zeros(n_sim)
        played[:len(x)] = np.clip(x, -1.0, 1.0)
        if imp.clock_offset_ppm:
            t = np.arange(n_sim) / (1.0 + imp.clock_offset_ppm * 1e-6)
            played = _interp_at(played, t)

        board = self._board(played, rng_in, rng_out, rng_hum, rng_dead)
        c = self.chain_latency_samples
        sigma_c = 10.0 ** (CAPTURE_NOISE_DBFS / 20.0)
        resp = _shift(board[:n_cap], c) + sigma_c * rng_resp.standard_normal(n_cap)
        resp = np.clip(resp, -1.0, 1.0)
        ref = None
        if self.has_reference:
            ref = _shift(played[:n_cap], c) + sigma_c * rng_ref.standard_normal(n_cap)
            ref = np.clip(ref, -1.0, 1.0)
        if drop_n:
            resp = np.delete(resp, np.s_[drop_at:drop_at + drop_n])
            if ref is not None:
                ref = np.delete(ref, np.s_[drop_at:drop_at + drop_n])
        resp = resp[:n_out]
        ref = ref[:n_out] if ref is not None else None
        meta = {
            "backend": "simulated",
            "device_id": self.device.id,
            "call_index": call,
            "seed": self.seed,
            "stream_latency_samples": c,
            "overflow": False,
            "underflow": False,
        }
        return Capture(response=resp, reference=ref, sample_rate_hz=fs, metadata=meta)

    # -- the board ---------------------------------------------------------------------
    def _board(self, x: np.ndarray, rng_in, rng_out, rng_hum, rng_dead) -> np.ndarray:
        imp = self.device.imperfections
        n = len(x)
        rail = imp.clip_level if imp.clip_level is not None else 1.0
        if imp.fault == "open":
            return np.zeros(n)
        if imp.fault == "short":
            return np.full(n, -rail)
        if imp.fault == "dead":
            level = imp.output_noise_dbfs if imp.output_noise_dbfs is not None else DEAD_NOISE_DBFS
            y = 10.0 ** (level / 20.0) * rng_dead.standard_normal(n)
        else:
            u = x
            if imp.input_noise_dbfs is not None:
                u = x + 10.0 ** (imp.input_noise_dbfs / 20.0) * rng_in.standard_normal(n)
            y = self._path.apply(u) * self._gain
            y = self._delay.apply(y)
            if imp.third_order_distortion:
                y = y + imp.third_order_distortion * y ** 3
            if imp.output_noise_dbfs is not None:
                y = y + 10.0 ** (imp.output_noise_dbfs / 20.0) * rng_out.standard_normal(n)
        if imp.hum_dbfs is not None:
            phase = rng_hum.uniform(0.0, 2 * np.pi)
            y = y + 10.0 ** (imp.hum_dbfs / 20.0) * np.cos(2 * np.pi * imp.hum_hz * np.arange(n) / self.sample_rate_hz + phase)
        if imp.dc_offset:
            y = y + imp.dc_offset
        if imp.clip_level is not None:
            y = np.clip(y, -imp.clip_level, imp.clip_level)
        return y

    # -- responses ---------------------------------------------------------------------
    def _freqs(self, freq_hz) -> np.ndarray:
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        if np.any(~np.isfinite(f)) or np.any(f < 0) or np.any(f > self.sample_rate_hz / 2 * (1 + 1e-12)):
            raise ValueError(f"frequencies must lie in 0..{self.sample_rate_hz / 2:g} Hz")
        return f

    def true_response(self, freq_hz) -> np.ndarray:
        """Complex response of everything the simulation does to a steady-state sine.

        Filter as implemented (digital sections; or the oversampled bilinear filter with
        its resampling FIRs), gain error and the board latency's exact FIR response.
        Computed from the coefficients (scipy.signal.sosfreqz, DTFT of FIR taps), never
        from a capture. Not included: noise, hum, DC, the nonlinearity (a sine of
        amplitude A at the board output gains ``1 + 3/4 k A**2``), clipping, the stream
        latency (not the board's), the clock offset (frequencies are on the capture
        clock's axis). A faulty board (open, short, dead) has response 0.

        Parameters
        ----------
        freq_hz : array_like
            Frequencies in Hz, 0..fs/2.

        Returns
        -------
        ndarray of complex
        """
        f = self._freqs(freq_hz)
        if self.device.imperfections.fault != "none":
            return np.zeros(f.shape, complex)
        omega = 2 * np.pi * f / self.sample_rate_hz
        return self._path.response(f) * self._gain * self._delay.response(omega)

    def ideal_response(self, freq_hz) -> np.ndarray:
        """The design's ideal response with gain error and latency, no simulation artefacts.

        ``H(f) * 10**(gain_error_db/20) * exp(-j 2 pi f latency_samples / fs)`` with H
        from scipy.signal.freqs_zpk (analog) or sosfreqz (digital). Ignores faults.
        """
        f = self._freqs(freq_hz)
        h = self.device.response(f, self.sample_rate_hz)
        lat = self.device.imperfections.latency_samples
        return h * self._gain * np.exp(-2j * np.pi * f * lat / self.sample_rate_hz)
