"""Audio-interface backend: one full-duplex PortAudio stream (python-sounddevice).

A station with ``backend = "audio"`` measures a real board through a sound card or USB
audio interface: one output drives the board, one input captures the board's output,
and (recommended) a second input takes the output straight back as the reference
channel, so everything the interface does to both inputs cancels in the ratio.

Station file section (validated by `parse_config`; channel numbers count from 1, as
printed on the interface)::

    [station.audio]
    device = "USB Audio"          # name substring (case-insensitive) or index
    host_api = "ALSA"             # optional: substring of the host API name
    stimulus_output = 1           # output that drives the board
    response_input = 1            # input that captures the board output
    reference_input = 2           # input that takes the stimulus back directly
    latency = "high"              # "low" | "high" | seconds (PortAudio suggested latency)
    block_size = 0                # frames per callback (0: PortAudio chooses)
    pilot_dbfs = -30.0            # level of the pilot chirp (never above max_output_dbfs)
    pilot_s = 0.25                # pilot duration
    pilot_min_db = 10.0           # the pilot must come back this far above the background
    settle_s = 0.3                # idle time after a stream starts (driver start-up)
    timeout_s = 10.0              # allowed beyond the signal's own duration
    latency_known = false         # true: the round trip is the same in every stream

How a measurement runs (`AudioBackend.play_and_capture`)
-------------------------------------------------------
1. The stimulus is checked against the station's maximum level
   (`harness.backends.base.assert_level`) before any stream is opened.
2. A stream session: one `sounddevice.Stream` with a callback, opened on the first
   measurement and kept running (writing silence between measurements) until
   `AudioBackend.close`. Inside one session the round-trip latency does not change, so a
   chain calibration made in the same session also calibrates the phase.
3. The pilot: after ``preroll`` of silence a short log chirp (20 Hz .. 0.45 fs, Hann
   tapered, ``pilot_dbfs``) is played. Its level must come back on the response input
   (and on the reference input) ``pilot_min_db`` above the silence before it, or the
   measurement is `invalid` ("no signal: is the board connected?") and the stimulus is
   never played.
4. The stimulus, followed by ``extra_samples`` of silence, is written by the callback
   from a buffer checked once more against the limit; the callback records the response
   (and reference) input from the same callback frames, i.e. on the same clock.
5. Any input overflow / underflow or output underflow / overflow the stream reports
   during the pilot or the stimulus closes the session and the whole measurement is
   repeated once in a fresh stream; a second report gives `InvalidMeasurement` naming
   the flags. A stream that stops delivering audio (``timeout_s``) is invalid too.

An unknown device, a channel the device lacks and a sample rate it refuses are
configuration errors (`harness.errors.ConfigError`, exit 2) naming the device.

Routing hook
------------
`set_stream_open_hook` installs a function called after a stream is opened and before
it starts (no sample has been written yet), with a dict describing the stream. With the
JACK host API this is the moment to connect the stream's ports; the audio-path tests use
it to wire the stream to a simulated board (`harness.jackboard`).
"""

from __future__ import annotations

import datetime as _dt
import math
import threading
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from harness.backends.base import Capture, assert_level
from harness.config import Table
from harness.errors import ConfigError, InvalidMeasurement

_KEYS = ("device", "host_api", "stimulus_output", "response_input", "reference_input", "latency",
         "block_size", "pilot_dbfs", "pilot_s", "pilot_min_db", "settle_s", "timeout_s", "latency_known")
PILOT_LOW_HZ = 20.0
PILOT_HIGH_FRACTION = 0.45          # of the sample rate
PREROLL_S = 0.1                     # silence before the pilot (the background it must beat)
PILOT_GAP_S = 0.2                   # silence after the pilot: its response decays before the stimulus
PILOT_BLOCK_S = 0.005               # short-time RMS blocks of the pilot detector
XRUN_FLAGS = ("input_overflow", "input_underflow", "output_overflow", "output_underflow")

_STREAM_OPEN_HOOK: Callable[[dict], None] | None = None


def set_stream_open_hook(hook: Callable[[dict], None] | None) -> Callable[[dict], None] | None:
    """Install `hook` (or None) to run after each stream opens, before it starts.

    The hook gets ``{"stream": sounddevice.Stream, "device": name, "host_api": name,
    "index": int, "session": id, "input_channels": n, "output_channels": n}``. An exception
    in the hook closes the stream and propagates. Returns the previous hook.
    """
    global _STREAM_OPEN_HOOK
    old, _STREAM_OPEN_HOOK = _STREAM_OPEN_HOOK, hook
    return old


# --------------------------------------------------------------------------------------
# configuration
@dataclass(frozen=True)
class AudioConfig:
    """The validated ``[station.audio]`` table (see the module docstring).

    Channel numbers count from 1. ``file`` is the station file (for error messages).
    """

    device: str | int
    stimulus_output: int = 1
    response_input: int = 1
    reference_input: int | None = None
    host_api: str | None = None
    latency: str | float = "high"
    block_size: int = 0
    pilot_dbfs: float = -30.0
    pilot_s: float = 0.25
    pilot_min_db: float = 10.0
    settle_s: float = 0.3
    timeout_s: float = 10.0
    latency_known: bool = False
    file: str | None = None

    def key(self, name: str) -> str:
        return f"station.audio.{name}"


def parse_config(table: Table, *, base_dir: Path, station_id: str, backend: str) -> AudioConfig:
    """Validate ``[station.audio]``; raises ConfigError naming the file, key and problem."""
    if backend != "audio":
        raise table.error(None, f"only a station with backend = \"audio\" takes [station.audio] "
                                f"(this one has backend = \"{backend}\")")
    table.check_known(_KEYS)
    if not table.has("device"):
        raise table.error("device", "missing key: name the interface (a part of its name, or its index "
                                    "as `harness audio devices` lists it)")
    dev = table.data["device"]
    if isinstance(dev, bool) or not isinstance(dev, (str, int)):
        raise table.error("device", f"must be a name (string) or an index (whole number), got {dev!r}")
    if isinstance(dev, str) and not dev.strip():
        raise table.error("device", "must not be empty")
    if isinstance(dev, int) and dev < 0:
        raise table.error("device", f"an index must be at least 0, got {dev}")
    host_api = table.str("host_api", None)
    out = table.int("stimulus_output", 1, min=1, max=1024)
    resp = table.int("response_input", 1, min=1, max=1024)
    ref = table.int("reference_input", None, min=1, max=1024)
    if ref is not None and ref == resp:
        raise table.error("reference_input", f"is the same input as response_input ({resp}); the reference "
                                             "needs an input of its own")
    lat: Any = table.data.get("latency", "high")
    if isinstance(lat, str):
        lat = table.str("latency", "high", choices=("low", "high"))
    else:
        lat = table.float("latency", min=0.0, max=2.0, min_exclusive=True)
    return AudioConfig(
        device=dev.strip() if isinstance(dev, str) else dev, host_api=host_api, stimulus_output=out,
        response_input=resp, reference_input=ref, latency=lat,
        block_size=table.int("block_size", 0, min=0, max=65536),
        pilot_dbfs=table.float("pilot_dbfs", -30.0, min=-100.0, max=0.0),
        pilot_s=table.float("pilot_s", 0.25, min=0.02, max=5.0),
        pilot_min_db=table.float("pilot_min_db", 10.0, min=3.0, max=80.0),
        settle_s=table.float("settle_s", 0.3, min=0.0, max=10.0),
        timeout_s=table.float("timeout_s", 10.0, min=0.5, max=600.0),
        latency_known=table.bool("latency_known", False),
        file=table.file)


# --------------------------------------------------------------------------------------
# PortAudio access
def import_sounddevice(file: str | None = None):
    """The sounddevice module, or a ConfigError saying how to install PortAudio."""
    try:
        import sounddevice
    except OSError as exc:  # the Python package is there, the PortAudio library is not
        raise ConfigError(file, "station.backend",
                          f"the audio backend needs the PortAudio library ({exc}): install it "
                          "(Debian/Ubuntu: apt-get install libportaudio2; macOS and Windows: it comes "
                          "with `pip install sounddevice`)") from None
    except ImportError:
        raise ConfigError(file, "station.backend",
                          "the audio backend needs the Python package sounddevice: pip install sounddevice") from None
    return sounddevice


def list_devices(sd=None) -> list[dict]:
    """PortAudio's devices: index, name, host API, input / output channels, default rate."""
    sd = sd or import_sounddevice()
    apis = sd.query_hostapis()
    out = []
    for d in sd.query_devices():
        out.append({"index": int(d["index"]), "name": d["name"], "host_api": apis[d["hostapi"]]["name"],
                    "inputs": int(d["max_input_channels"]), "outputs": int(d["max_output_channels"]),
                    "default_rate_hz": float(d["default_samplerate"])})
    return out


def _describe(d: dict) -> str:
    return f"[{d['index']}] '{d['name']}' ({d['host_api']}, {d['inputs']} in / {d['outputs']} out)"


def find_device(cfg: AudioConfig, devices: list[dict]) -> dict:
    """The one device `cfg` selects (by index, or by name substring and host API).

    Raises ConfigError (naming ``station.audio.device``) when none or several match.
    """
    file = cfg.file
    if not devices:
        raise ConfigError(file, cfg.key("device"), "PortAudio finds no audio device on this computer")
    listing = "; ".join(_describe(d) for d in devices[:20])
    if isinstance(cfg.device, int):
        match = [d for d in devices if d["index"] == cfg.device]
        if not match:
            raise ConfigError(file, cfg.key("device"), f"no audio device has index {cfg.device}; "
                                                       f"devices: {listing}")
        return match[0]
    want = cfg.device.lower()
    match = [d for d in devices if want in d["name"].lower()]
    if cfg.host_api:
        match = [d for d in match if cfg.host_api.lower() in d["host_api"].lower()]
    if not match:
        api = f" under host API '{cfg.host_api}'" if cfg.host_api else ""
        raise ConfigError(file, cfg.key("device"), f"no audio device name contains '{cfg.device}'{api}; "
                                                   f"devices: {listing}")
    exact = [d for d in match if d["name"].lower() == want]
    if len(match) > 1 and len(exact) == 1:
        return exact[0]
    if len(match) > 1:
        raise ConfigError(file, cfg.key("device"),
                          f"'{cfg.device}' matches {len(match)} devices: "
                          f"{'; '.join(_describe(d) for d in match)}; give host_api or the index")
    return match[0]


def pilot_signal(sample_rate_hz: float, duration_s: float, level_dbfs: float) -> np.ndarray:
    """The pilot: a Hann-tapered logarithmic chirp from 20 Hz to 0.45 fs whose peak is
    `level_dbfs` (scipy.signal.chirp)."""
    from scipy import signal

    n = max(16, int(round(duration_s * sample_rate_hz)))
    t = np.arange(n) / sample_rate_hz
    x = signal.chirp(t, PILOT_LOW_HZ, t[-1], PILOT_HIGH_FRACTION * sample_rate_hz, method="logarithmic")
    x = x * signal.windows.tukey(n, 0.2)
    return x * (10.0 ** (level_dbfs / 20.0) / np.max(np.abs(x)))


def pilot_rise_db(x: np.ndarray, background: slice, window: slice, block: int) -> float:
    """How far (dB) the loudest short-time RMS block of `x` in `window` rises above the
    loudest one in `background` (+inf over digital silence, -inf when nothing came)."""
    def loudest(seg: np.ndarray) -> float:
        nb = seg.size // block
        if nb == 0:
            return float(np.sqrt(np.mean(seg ** 2))) if seg.size else 0.0
        return float(np.max(np.sqrt(np.mean(seg[:nb * block].reshape(nb, block) ** 2, axis=1))))

    x = np.asarray(x, dtype=np.float64)
    sig, bg = loudest(x[window]), loudest(x[background])
    if sig <= 0.0:
        return -math.inf
    if bg <= 0.0:
        return math.inf
    return 20.0 * math.log10(sig / bg)


# --------------------------------------------------------------------------------------
class _Job:
    """One buffer to play and record from the callback."""

    def __init__(self, out: np.ndarray, n_rec: int):
        self.out = out
        self.n = int(out.size)
        self.rec = np.zeros((self.n, n_rec), dtype=np.float32)
        self.pos = 0
        self.flags: list[str] = []
        self.done = threading.Event()


@dataclass
class _Session:
    stream: Any
    id: str
    opened_utc: str
    latency_s: Any = None
    info: dict = field(default_factory=dict)


class AudioBackend:
    """A station's audio interface behind the `harness.backends.base.Backend` interface.

    Parameters
    ----------
    config : AudioConfig
        The ``[station.audio]`` table.
    sample_rate_hz : float
        Stream rate, Hz.
    max_output_dbfs : float
        Nothing above this peak level is ever written to the stream.
    reference_channel : bool
        Whether the station uses a reference input (then ``config.reference_input``).
    station_id : str, optional
        For the identity recorded in certificates.
    on_stream_open : callable, optional
        Routing hook (default: the one `set_stream_open_hook` installed).
    sd : module, optional
        The sounddevice module (default: imported).

    Raises
    ------
    ConfigError
        Unknown or ambiguous device, missing channels, unsupported sample rate.
    """

    def __init__(self, config: AudioConfig, *, sample_rate_hz: float, max_output_dbfs: float,
                 reference_channel: bool, station_id: str = "", on_stream_open=None, sd=None):
        self.config = config
        self.sample_rate_hz = float(sample_rate_hz)
        self.max_output_dbfs = float(max_output_dbfs)
        self.has_reference = bool(reference_channel)
        self.station_id = station_id
        self._hook = on_stream_open
        file = config.file
        if self.has_reference and config.reference_input is None:
            raise ConfigError(file, config.key("reference_input"),
                              "missing key: the station uses a reference channel (reference_channel = true, the "
                              "default); name the input that takes the stimulus back, or set "
                              "[station].reference_channel = false and calibrate the chain")
        if not self.has_reference and config.reference_input is not None:
            raise ConfigError(file, config.key("reference_input"),
                              "the station says reference_channel = false; remove reference_input, or set "
                              "reference_channel = true to use it (a reference channel is used whenever present)")
        self._sd = sd or import_sounddevice(file)
        self.device = find_device(config, list_devices(self._sd))
        d = self.device
        n_in = max(config.response_input, config.reference_input or 0)
        if config.stimulus_output > d["outputs"]:
            raise ConfigError(file, config.key("stimulus_output"),
                              f"output {config.stimulus_output} does not exist: device {_describe(d)} has "
                              f"{d['outputs']} output channel(s)")
        for key, ch in (("response_input", config.response_input), ("reference_input", config.reference_input)):
            if ch is not None and ch > d["inputs"]:
                raise ConfigError(file, config.key(key),
                                  f"input {ch} does not exist: device {_describe(d)} has {d['inputs']} input "
                                  "channel(s)")
        self.input_channels, self.output_channels = n_in, config.stimulus_output
        for check, n, what in ((self._sd.check_input_settings, n_in, "inputs"),
                               (self._sd.check_output_settings, config.stimulus_output, "outputs")):
            try:
                check(device=d["index"], channels=n, dtype="float32", samplerate=self.sample_rate_hz)
            except self._sd.PortAudioError as exc:
                raise ConfigError(file, "station.sample_rate_hz",
                                  f"device {_describe(d)} refuses {self.sample_rate_hz:g} Hz with {n} {what} "
                                  f"({exc}); its default rate is {d['default_rate_hz']:g} Hz") from None
        self._in_cols = [config.response_input - 1] + ([config.reference_input - 1] if self.has_reference else [])
        self._out_col = config.stimulus_output - 1
        lim = 10.0 ** (self.max_output_dbfs / 20.0)
        lim32 = np.float32(lim)
        self._limit32 = lim32 if float(lim32) <= lim else np.nextafter(lim32, np.float32(0))
        self._session: _Session | None = None
        self._job: _Job | None = None
        self._closed = False
        self.sessions_opened = 0
        self.frames_written = 0          # stimulus/pilot frames handed to the stream (not silence)

    # -- Backend interface -------------------------------------------------------------
    def identity(self) -> dict:
        """The interface as PortAudio names it, the channel map and the stream session."""
        d, c = self.device, self.config
        return {"backend": "audio", "device": d["name"], "device_index": d["index"], "host_api": d["host_api"],
                "portaudio": self._sd.get_portaudio_version()[1], "sample_rate_hz": self.sample_rate_hz,
                "stimulus_output": c.stimulus_output, "response_input": c.response_input,
                "reference_input": c.reference_input if self.has_reference else None,
                "stream_session": self._session.id if self._session else None,
                "latency_known": c.latency_known, "station": self.station_id,
                "model": None, "firmware": None}

    def close(self) -> None:
        """Stop and close the stream (idempotent)."""
        self._drop_session()
        self._closed = True

    def __enter__(self) -> "AudioBackend":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @property
    def session_id(self) -> str | None:
        """The running stream session (None before the first measurement or after close)."""
        return self._session.id if self._session else None

    def play_and_capture(self, stimulus: np.ndarray, *, extra_samples: int = 0) -> Capture:
        """Play `stimulus` (full-scale units) after a pilot and capture
        ``len(stimulus) + extra_samples`` samples of the response (and the reference),
        in one full-duplex stream (module docstring).

        Raises
        ------
        LevelLimitError
            The stimulus exceeds the station's maximum level (nothing is written).
        InvalidMeasurement
            No pilot back (board not connected), stream overflow / underflow twice,
            timeout, or a stream that cannot be opened.
        """
        if self._closed:
            raise InvalidMeasurement("audio backend: play_and_capture called after close()")
        x = np.asarray(stimulus, dtype=np.float64)
        if x.ndim != 1 or x.size == 0:
            raise ValueError(f"stimulus must be a non-empty one-dimensional array, got shape {x.shape}")
        if not np.all(np.isfinite(x)):
            raise ValueError("stimulus contains NaN or infinite samples")
        if isinstance(extra_samples, bool) or not isinstance(extra_samples, (int, np.integer)) or extra_samples < 0:
            raise ValueError(f"extra_samples must be a whole number >= 0, got {extra_samples!r}")
        assert_level(x, self.max_output_dbfs)                # before any stream exists
        fs = self.sample_rate_hz
        cfg = self.config
        pilot_level = min(cfg.pilot_dbfs, self.max_output_dbfs)
        pilot = pilot_signal(fs, cfg.pilot_s, pilot_level)
        pre, gap = int(round(PREROLL_S * fs)), int(round(PILOT_GAP_S * fs))
        pilot_buf = np.concatenate([np.zeros(pre), pilot, np.zeros(gap)])
        stim_buf = np.concatenate([x, np.zeros(int(extra_samples))])
        for buf in (pilot_buf, stim_buf):
            assert_level(buf, self.max_output_dbfs)
        pilot32, stim32 = self._to_output(pilot_buf), self._to_output(stim_buf)

        first_flags = None
        for attempt in (1, 2):
            self._ensure_session()
            session = self._session
            job = self._run(pilot32)
            if job.flags:
                first_flags = first_flags or job.flags
                self._drop_session()
                if attempt == 1:
                    continue
                break
            pilot_info = self._check_pilot(job, pre, pilot.size + gap, pilot_level)
            job = self._run(stim32)
            if job.flags:
                first_flags = first_flags or job.flags
                self._drop_session()
                if attempt == 1:
                    continue
                break
            rec = job.rec.astype(np.float64)
            meta = {"backend": "audio", "device": self.device["name"], "host_api": self.device["host_api"],
                    "stream_session": session.id, "stream_opened_utc": session.opened_utc,
                    "stream_latency_s": session.latency_s, "latency_known": cfg.latency_known,
                    "attempt": attempt, "pilot": pilot_info, "overflow": False, "underflow": False}
            if attempt == 2:
                meta["retried_after"] = first_flags[0]
            return Capture(response=rec[:, 0], reference=rec[:, 1] if self.has_reference else None,
                           sample_rate_hz=fs, metadata=meta)
        raise InvalidMeasurement(f"dropout: the audio stream of {self.device['name']} reported "
                                 f"{first_flags[0]} in two attempts (the measurement was repeated once in a "
                                 "fresh stream); close other audio programs, raise latency or block_size, or "
                                 "check the interface's connection")

    # -- internals ---------------------------------------------------------------------
    def _to_output(self, buf: np.ndarray) -> np.ndarray:
        """float32 samples, never above the limit (float32 rounding could add 6e-8)."""
        return np.clip(buf.astype(np.float32), -self._limit32, self._limit32)

    def _callback(self, indata, outdata, frames, time_info, status) -> None:
        outdata.fill(0)
        job = self._job
        if job is None or job.done.is_set():
            return
        if status:
            bad = [name.replace("_", " ") for name in XRUN_FLAGS if getattr(status, name, False)]
            if bad:
                job.flags.append(f"{', '.join(bad)} at sample {job.pos}")
        k = min(frames, job.n - job.pos)
        # the job buffer was checked against the limit; clip again so that nothing above
        # it can ever reach the stream, whatever happens to the buffer
        outdata[:k, self._out_col] = np.clip(job.out[job.pos:job.pos + k], -self._limit32, self._limit32)
        job.rec[job.pos:job.pos + k] = indata[:k, self._in_cols]
        job.pos += k
        if job.pos >= job.n:
            job.done.set()

    def _ensure_session(self) -> None:
        if self._session is not None and self._session.stream.active:
            return
        self._drop_session()
        sd = self._sd
        d = self.device
        sid = f"{_dt.datetime.now(_dt.timezone.utc).strftime('%Y%m%dT%H%M%SZ')}-{uuid.uuid4().hex[:8]}"
        try:
            stream = sd.Stream(samplerate=self.sample_rate_hz, blocksize=self.config.block_size,
                               device=(d["index"], d["index"]),
                               channels=(self.input_channels, self.output_channels), dtype="float32",
                               latency=self.config.latency, callback=self._callback)
        except sd.PortAudioError as exc:
            raise InvalidMeasurement(f"cannot open the audio stream on {_describe(d)}: {exc}") from None
        session = _Session(stream, sid, _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"))
        try:
            session.latency_s = [float(v) for v in stream.latency]
        except (TypeError, ValueError):
            session.latency_s = None
        info = {"stream": stream, "device": d["name"], "host_api": d["host_api"], "index": d["index"],
                "session": sid, "input_channels": self.input_channels, "output_channels": self.output_channels}
        session.info = {k: v for k, v in info.items() if k != "stream"}
        hook = self._hook if self._hook is not None else _STREAM_OPEN_HOOK
        try:
            if hook is not None:
                hook(info)
            stream.start()
        except BaseException as exc:
            stream.close(ignore_errors=True)
            if isinstance(exc, sd.PortAudioError):
                raise InvalidMeasurement(f"cannot start the audio stream on {_describe(d)}: {exc}") from None
            raise
        self._session = session
        self.sessions_opened += 1
        time.sleep(self.config.settle_s)          # driver start-up: flags while idle do not count

    def _drop_session(self) -> None:
        s, self._session = self._session, None
        self._job = None
        if s is not None:
            try:
                s.stream.stop(ignore_errors=True)
            finally:
                s.stream.close(ignore_errors=True)

    def _run(self, out32: np.ndarray) -> _Job:
        job = _Job(out32, len(self._in_cols))
        self._job = job
        self.frames_written += job.n
        limit = job.n / self.sample_rate_hz + self.config.timeout_s
        ok = job.done.wait(limit)
        self._job = None
        if not ok:
            name = self.device["name"]
            self._drop_session()
            raise InvalidMeasurement(f"timeout: the audio stream of {name} delivered {job.pos} of {job.n} samples "
                                     f"in {limit:.1f} s; the interface stopped or was unplugged")
        return job

    def _check_pilot(self, job: _Job, pre: int, span: int, level_dbfs: float) -> dict:
        block = max(16, int(round(PILOT_BLOCK_S * self.sample_rate_hz)))
        bg = slice(pre // 2, pre)                   # the start of a stream may carry a transient
        win = slice(pre, pre + span)
        need = self.config.pilot_min_db
        info = {"level_dbfs": level_dbfs, "duration_s": self.config.pilot_s, "min_rise_db": need}
        names = ["response", "reference"][:len(self._in_cols)]
        for col, name in enumerate(names):
            rise = pilot_rise_db(job.rec[:, col], bg, win, block)
            info[f"{name}_rise_db"] = None if math.isinf(rise) else round(rise, 2)
            if not rise >= need:
                inp = self.config.response_input if name == "response" else self.config.reference_input
                shown = ("did not come back at all" if rise == -math.inf else
                         f"came back only {rise:.1f} dB above the background (need {need:g} dB)")
                if name == "response":
                    raise InvalidMeasurement(
                        f"no signal: is the board connected? The pilot ({level_dbfs:.0f} dBFS chirp) {shown} on "
                        f"input {inp} (response) of {self.device['name']}. Nothing else was played.")
                raise InvalidMeasurement(
                    f"no reference: the pilot ({level_dbfs:.0f} dBFS chirp) {shown} on input {inp} (reference) of "
                    f"{self.device['name']}; check the loopback cable from the output to the reference input")
        return info


def open_backend(station) -> AudioBackend:
    """The backend of an ``audio`` station (`harness.measure.make_backend` calls this)."""
    cfg = station.section("audio")
    if cfg is None:
        raise ConfigError(station.path, "station.audio", "missing table [station.audio] (an audio station needs it)")
    return AudioBackend(cfg, sample_rate_hz=station.sample_rate_hz, max_output_dbfs=station.max_output_dbfs,
                        reference_channel=station.reference_channel, station_id=station.id)


def calibrate_in_session(station, backend: AudioBackend, *, write: bool = True, f_min_hz: float = 10.0):
    """Chain calibration through a loopback in `backend`'s stream session.

    Measured like ``harness calibrate`` (`harness.calibration.calibrate`) but the
    returned calibration remembers the stream session, so a station without a reference
    channel also judges phase rules on units measured afterwards with the same backend
    (the stream latency is the same; `harness.analysis.phase_not_assessed`). Connect the
    loopback before calling, the board after.

    Returns
    -------
    doc : dict
        The calibration document (also written to the station's calibration file when
        `write` and the station names one). `f_min_hz` is the lowest calibrated frequency
        (the multitone period grows with its inverse: 10 Hz takes about 9 s).
    calibration : harness.analysis.ChainCalibration
    info : dict
        For `harness.measure.measure_unit(calibration_info=...)`: id, dates, file and
        ``stream_session``.
    """
    from harness.calibration import calibrate, parse_calibration, write_calibration

    doc = calibrate(station, backend, f_min_hz=f_min_hz)
    doc["stream_session"] = backend.session_id
    path = write_calibration(station, doc) if write and station.calibration.file is not None else None
    cal = parse_calibration(doc, str(path) if path else "calibration")
    info = {"id": doc["id"], "created_utc": doc["created_utc"], "due_utc": doc["due_utc"],
            "file": path.name if path else None, "stream_session": backend.session_id}
    return doc, cal, info
