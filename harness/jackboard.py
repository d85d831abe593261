"""A simulated board as a real-time JACK client: the device under test of the audio path
tests, and a way to try a station file without hardware.

``python -m harness.jackboard MODEL.toml [--name board] [--server NAME]`` joins a running
JACK server as client ``board`` with one input port ``in_1`` and one output port
``out_1``. Every JACK period it filters the block arriving on ``in_1`` with the device
model (state carried from block to block, so a stream of blocks is filtered exactly like
one long signal) and adds the model's imperfections, then writes the result to
``out_1``. Connect an audio stream's output to ``board:in_1`` and ``board:out_1`` to the
stream's input, as a cable to a real board would.

The filter (`StreamingBoard`)
-----------------------------
One clock, one rate: the board runs at the JACK server's sample rate fs.

* Digital models run their own second-order sections (`scipy.signal.sosfilt` with its
  state ``zi``). A digital model made for another rate is refused.
* Analog models are discretised with the bilinear transform at fs
  (`scipy.signal.bilinear_zpk`), prewarped at whichever of the model's characteristic
  frequency and its pole frequencies inside 0.001..0.45 fs gives the smallest residual
  ``max |H_board - H_analog| / max |H_analog|`` over 0..0.45 fs
  (`StreamingBoard.analog_residual`). Frequency warping makes that residual grow toward
  Nyquist; unlike `harness.backends.simulated.SimulatedBoard` this board does not
  oversample (real time on a shared CPU), so compare measurements with
  `StreamingBoard.response`, the exact response of what runs.
* Gain error, latency (whole samples as a shift; a fractional part as a causal
  Kaiser-windowed sinc FIR, which adds ``FRACTIONAL_LOOKAHEAD`` whole samples of delay:
  see `StreamingBoard.latency_samples`), input and output noise, hum (phase continuous
  across blocks), DC offset, ``y + k y**3``, clipping and the faults ``open``, ``short``
  and ``dead`` as `harness.device` documents them. A clock offset and dropouts cannot
  exist on one JACK clock: they are ignored with a warning (use ``stall`` for
  interruptions).

Control (one command per line on standard input; one answer line on standard output)
----------------------------------------------------------------------------------------
``stall SECONDS [EVERY [AFTER]]``  sleep SECONDS inside the process callback once (EVERY
                           = 0) or every EVERY-th period, starting AFTER periods from now
                           (default 0), so the JACK server reports an xrun
``nostall``                stop stalling
``disconnect``             disconnect both ports from everything (a pulled cable)
``status``                 ``status {json}``: periods processed, peak input level seen,
                           xruns, stalls, rate and period size
``reset``                  zero the counters and the peak
``quit``                   leave (also on end of input)

The first line written is ``ready {json}`` once the client is active.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import threading
import time

import numpy as np
from scipy import signal, special

from harness.device import DeviceModel

FRACTIONAL_HALF_LENGTH = 32          # taps each side of the fractional-delay sinc
FRACTIONAL_BETA = 10.0               # Kaiser window of the fractional-delay sinc
FRACTIONAL_LOOKAHEAD = FRACTIONAL_HALF_LENGTH - 1   # whole samples a causal fractional delay adds
DEAD_NOISE_DBFS = -80.0              # rms noise of a dead board without output_noise_dbfs


def _kernel(u: np.ndarray) -> np.ndarray:
    """Kaiser-windowed sinc at offsets `u` (samples), zero for ``|u| >= FRACTIONAL_HALF_LENGTH``."""
    r = np.clip(1.0 - (np.asarray(u, float) / FRACTIONAL_HALF_LENGTH) ** 2, 0.0, None)
    return np.where(r > 0, np.sinc(u) * special.i0(FRACTIONAL_BETA * np.sqrt(r)) / special.i0(FRACTIONAL_BETA), 0.0)


def _prewarp_candidates(p: np.ndarray, fs: float, characteristic_hz: float | None) -> list[float]:
    cands = [] if not characteristic_hz else [min(float(characteristic_hz), 0.45 * fs)]
    for f in np.unique(np.round(np.abs(np.asarray(p)) / (2 * np.pi), 6)):
        if 1e-3 * fs <= f <= 0.45 * fs and all(abs(f / c - 1) > 1e-3 for c in cands):
            cands.append(float(f))
    return cands or [0.0]


def analog_to_sos(z, p, k, fs: float, characteristic_hz: float | None) -> tuple[np.ndarray, float, float]:
    """Bilinear transform of an analog filter at `fs`, prewarped for the smallest residual.

    Parameters
    ----------
    z, p : array_like of complex
        Zeros and poles in rad/s.
    k : float
        Gain.
    fs : float
        Sample rate, Hz.
    characteristic_hz : float or None
        The filter's cutoff or band centre, Hz (a prewarp candidate).

    Returns
    -------
    sos : ndarray, shape (n_sections, 6)
    prewarp_hz : float
        The frequency at which the digital response equals the analog one exactly in
        frequency (0: no prewarp).
    residual : float
        ``max |H_digital - H_analog|`` over 0..0.45 fs relative to ``max |H_analog|``
        (H_analog from scipy.signal.freqs_zpk).
    """
    z, p = np.asarray(z, complex), np.asarray(p, complex)
    grid = np.unique(np.concatenate([np.linspace(0.0, 0.45 * fs, 1024), np.geomspace(1e-4 * fs, 0.45 * fs, 512)]))
    ideal = signal.freqs_zpk(z, p, k, worN=2 * np.pi * grid)[1]
    peak = max(float(np.max(np.abs(ideal))), 1e-300)
    best = None
    for c in _prewarp_candidates(p, fs, characteristic_hz):
        beta = 1.0
        if c > 0:
            w = 2 * np.pi * c
            beta = w / (2 * fs * math.tan(w / (2 * fs)))
        zd, pd, kd = signal.bilinear_zpk(z / beta, p / beta, k * beta ** (len(z) - len(p)), fs)
        sos = signal.zpk2sos(zd, pd, kd)
        res = float(np.max(np.abs(signal.sosfreqz(sos, worN=grid, fs=fs)[1] - ideal))) / peak
        if best is None or res < best[2]:
            best = (sos, float(c), res)
    return best


class StreamingBoard:
    """A device model filtering block by block, its state carried across blocks.

    Parameters
    ----------
    device : harness.device.DeviceModel
    sample_rate_hz : float
        The stream's rate, Hz (digital models must have been made for it).
    seed : int, optional
        Seed of the noise (default: the model's ``imperfections.seed``).

    Attributes
    ----------
    sos : ndarray
        The sections that run (the model's own, or the bilinear discretisation).
    analog_residual : float or None
        See `analog_to_sos` (None for a digital model).
    latency_samples : float
        The board's delay as it runs: the model's latency, plus `FRACTIONAL_LOOKAHEAD`
        when that latency has a fractional part.
    warnings : list of str
        Imperfections this board cannot reproduce in real time.
    """

    def __init__(self, device: DeviceModel, sample_rate_hz: float, *, seed: int | None = None):
        self.device = device
        self.fs = float(sample_rate_hz)
        imp = device.imperfections
        self.warnings: list[str] = []
        if device.filter.analog:
            z, p, k = device.filter.analog_zpk()
            self.sos, self.prewarp_hz, self.analog_residual = analog_to_sos(
                z, p, k, self.fs, device.filter.characteristic_hz())
        else:
            self.sos = np.asarray(device.filter.digital_sos(self.fs, device.source), float)
            self.prewarp_hz, self.analog_residual = None, None
        self._zi = np.zeros((self.sos.shape[0], 2))
        whole = int(math.floor(imp.latency_samples))
        frac = float(imp.latency_samples) - whole
        if frac > 1e-12:
            m = np.arange(2 * FRACTIONAL_HALF_LENGTH)
            fir = _kernel(m - FRACTIONAL_LOOKAHEAD - frac)
            self.latency_samples = whole + FRACTIONAL_LOOKAHEAD + frac
        else:
            fir = np.ones(1)
            self.latency_samples = float(whole)
        self._fir = np.concatenate([np.zeros(whole), fir])
        self._fir_zi = np.zeros(self._fir.size - 1)
        self._gain = 10.0 ** (imp.gain_error_db / 20.0)
        self._rng = np.random.default_rng(imp.seed if seed is None else seed)
        self._n = 0                                  # samples processed (hum phase)
        if imp.clock_offset_ppm:
            self.warnings.append(f"clock_offset_ppm = {imp.clock_offset_ppm:g} ignored: a JACK graph runs on one clock")
        if imp.dropout_at_s is not None:
            self.warnings.append("dropout_at_s ignored: use the 'stall' command to interrupt the stream")

    def process(self, x: np.ndarray) -> np.ndarray:
        """Filter one block (any length); returns the board output for it (float64)."""
        imp = self.device.imperfections
        x = np.asarray(x, dtype=np.float64)
        n = x.size
        if n == 0:
            return np.zeros(0)
        rng = self._rng
        rail = imp.clip_level if imp.clip_level is not None else 1.0
        if imp.fault == "open":
            y = np.zeros(n)
        elif imp.fault == "short":
            y = np.full(n, -rail)
        else:
            if imp.fault == "dead":
                level = imp.output_noise_dbfs if imp.output_noise_dbfs is not None else DEAD_NOISE_DBFS
                y = 10.0 ** (level / 20.0) * rng.standard_normal(n)
            else:
                u = x
                if imp.input_noise_dbfs is not None:
                    u = x + 10.0 ** (imp.input_noise_dbfs / 20.0) * rng.standard_normal(n)
                y, self._zi = signal.sosfilt(self.sos, u, zi=self._zi)
                y, self._fir_zi = signal.lfilter(self._fir, [1.0], y * self._gain, zi=self._fir_zi)
                if imp.third_order_distortion:
                    y = y + imp.third_order_distortion * y ** 3
                if imp.output_noise_dbfs is not None:
                    y = y + 10.0 ** (imp.output_noise_dbfs / 20.0) * rng.standard_normal(n)
            if imp.hum_dbfs is not None:
                t = (self._n + np.arange(n)) / self.fs
                y = y + 10.0 ** (imp.hum_dbfs / 20.0) * np.cos(2 * np.pi * imp.hum_hz * t)
            if imp.dc_offset:
                y = y + imp.dc_offset
            if imp.clip_level is not None:
                y = np.clip(y, -imp.clip_level, imp.clip_level)
        self._n += n
        return y

    def response(self, freq_hz) -> np.ndarray:
        """Exact complex response of what runs, at `freq_hz` (Hz): the sections
        (scipy.signal.sosfreqz), the gain error and the latency FIR (DTFT of its taps).
        Noise, hum, DC, the nonlinearity and clipping are not part of it; a faulty board
        has response 0."""
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        if self.device.imperfections.fault != "none":
            return np.zeros(f.shape, complex)
        h = signal.sosfreqz(self.sos, worN=f, fs=self.fs)[1]
        w = 2 * np.pi * f / self.fs
        lat = np.exp(-1j * np.outer(w, np.arange(self._fir.size))) @ self._fir
        return h * self._gain * lat

    def ideal_response(self, freq_hz) -> np.ndarray:
        """The model's ideal response (analog: scipy.signal.freqs_zpk) with its gain error
        and the latency as it runs (`latency_samples`), for comparison with `response`."""
        f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        h = self.device.response(f, self.fs)
        return h * self._gain * np.exp(-2j * np.pi * f * self.latency_samples / self.fs)


# --------------------------------------------------------------------------------------
# the JACK client process
class _Control:
    def __init__(self):
        self.stall_s = 0.0
        self.stall_every = 0
        self.stall_at = -1              # period number of the next stall (-1: none)
        self.blocks = 0
        self.peak_in = 0.0
        self.xruns = 0
        self.stalls = 0


def _answer(text: str) -> None:
    sys.stdout.write(text + "\n")
    sys.stdout.flush()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m harness.jackboard",
                                 description="A simulated board (device model TOML) as a real-time JACK client.")
    ap.add_argument("model", help="device model TOML (see harness.device)")
    ap.add_argument("--name", default="board", help="JACK client name (default: board)")
    ap.add_argument("--server", default=None, help="JACK server name (default: $JACK_DEFAULT_SERVER or 'default')")
    ap.add_argument("--seed", type=int, default=None, help="noise seed (default: the model's)")
    args = ap.parse_args(argv)

    from harness.device import load_device_model
    from harness.errors import HarnessError

    try:
        model = load_device_model(args.model)
    except HarnessError as exc:
        print(f"jackboard: {exc}", file=sys.stderr)
        return 2
    import jack

    try:
        client = jack.Client(args.name, servername=args.server, no_start_server=True)
    except jack.JackError as exc:
        print(f"jackboard: cannot join the JACK server ({exc}); is jackd running?", file=sys.stderr)
        return 4
    try:
        board = StreamingBoard(model, client.samplerate, seed=args.seed)
    except HarnessError as exc:
        print(f"jackboard: {exc}", file=sys.stderr)
        client.close()
        return 2
    for w in board.warnings:
        print(f"jackboard: warning: {w}", file=sys.stderr)
    inp = client.inports.register("in_1")
    out = client.outports.register("out_1")
    ctl = _Control()
    gone = threading.Event()

    @client.set_process_callback
    def process(frames):
        ctl.blocks += 1
        if ctl.stall_s > 0 and 0 <= ctl.stall_at <= ctl.blocks:
            ctl.stall_at = ctl.blocks + ctl.stall_every if ctl.stall_every else -1
            ctl.stalls += 1
            time.sleep(ctl.stall_s)
        x = inp.get_array()
        peak = float(np.max(np.abs(x))) if frames else 0.0
        if peak > ctl.peak_in:
            ctl.peak_in = peak
        out.get_array()[:] = board.process(x)

    @client.set_xrun_callback
    def xrun(delay_usecs):
        ctl.xruns += 1

    @client.set_shutdown_callback
    def shutdown(status, reason):
        gone.set()

    client.activate()
    _answer("ready " + json.dumps({"client": client.name, "in": inp.name, "out": out.name,
                                   "sample_rate_hz": client.samplerate, "period": client.blocksize,
                                   "device": model.id, "latency_samples": board.latency_samples,
                                   "analog_residual": board.analog_residual}))
    try:
        for line in sys.stdin:
            if gone.is_set():
                break
            words = line.split()
            if not words:
                continue
            cmd = words[0]
            try:
                if cmd == "stall":
                    every = int(words[2]) if len(words) > 2 else 0
                    after = int(words[3]) if len(words) > 3 else 0
                    if every < 0 or after < 0:
                        raise ValueError("EVERY and AFTER must be >= 0")
                    ctl.stall_s, ctl.stall_every = float(words[1]), every
                    ctl.stall_at = ctl.blocks + max(after, 1)
                elif cmd == "nostall":
                    ctl.stall_s, ctl.stall_every, ctl.stall_at = 0.0, 0, -1
                elif cmd == "disconnect":
                    for port in (inp, out):
                        port.disconnect()
                elif cmd == "status":
                    _answer("status " + json.dumps({"blocks": ctl.blocks, "peak_in": ctl.peak_in,
                                                    "xruns": ctl.xruns, "stalls": ctl.stalls,
                                                    "sample_rate_hz": client.samplerate,
                                                    "period": client.blocksize}))
                    continue
                elif cmd == "reset":
                    ctl.peak_in, ctl.xruns, ctl.stalls = 0.0, 0, 0
                elif cmd == "quit":
                    _answer("ok quit")
                    break
                else:
                    _answer(f"error unknown command {cmd!r}")
                    continue
            except (IndexError, ValueError, jack.JackError) as exc:
                _answer(f"error {cmd}: {exc}")
                continue
            _answer(f"ok {cmd}")
    finally:
        try:
            client.deactivate()
            client.close()
        except jack.JackError:
            pass
    return 0


if __name__ == "__main__":
    sys.exit(main())
