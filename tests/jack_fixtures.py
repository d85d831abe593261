"""Fixtures of the real audio path: a private JACK server (dummy driver), a simulated
board as a separate JACK client process (`harness.jackboard`), and the wiring between
them and the harness's PortAudio stream.

Imported by tests/test_audio_jack.py. Every process started here runs in its own
process group and is stopped (SIGTERM, then SIGKILL) in the fixture finalizers, also
when a test fails.

Without jackd, JACK-Client or PortAudio the tests skip locally with a message saying
what to install; in CI (environment variable CI set) they fail instead.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = ROOT / "fixtures"
JACK_RATE_HZ = 48000


def _realtime_allowed() -> bool:
    """Whether this machine lets a process take SCHED_FIFO (root or CAP_SYS_NICE)."""
    try:
        r = subprocess.run([sys.executable, "-c", "import os; os.sched_setscheduler(0, os.SCHED_FIFO, "
                                                  "os.sched_param(1))"], capture_output=True, timeout=20)
        return r.returncode == 0
    except (OSError, subprocess.SubprocessError):
        return False


# Real-time scheduling where the machine allows it, and periods of 1024 samples (21 ms):
# on a busy shared CI machine (measured at a load of 3 on 2 cores) a non-real-time server
# with periods of 256 samples reported an xrun in every 4-s measurement, and even with
# real-time scheduling the Python callbacks (the board's and the harness's) now and then
# take 8 ms, longer than a 5.3-ms period; with 1024 samples none in 36 s. Without
# real-time scheduling (--no-realtime): 2048 samples. A measurement with stream errors is
# rightly invalid, so the test rig must not produce them by itself.
# HARNESS_JACKD_MODE / HARNESS_JACK_PERIOD override both.
def jackd_settings() -> tuple[tuple[str, ...], int]:
    """(scheduling options of jackd, period in samples) for this machine."""
    mode = os.environ.get("HARNESS_JACKD_MODE")
    if mode is None:
        mode = "-R -P 70" if _realtime_allowed() else "--no-realtime"
    opts = tuple(mode.split())
    return opts, int(os.environ.get("HARNESS_JACK_PERIOD", "1024" if "-R" in opts else "2048"))
HOW_TO_ENABLE = ("install the Debian packages jackd2 and libportaudio2 and the test extra "
                 "(pip install -e '.[test]', which brings JACK-Client); then run pytest again")


def _unavailable() -> str | None:
    if shutil.which("jackd") is None:
        return "jackd (the JACK server) is not installed"
    try:
        import jack  # noqa: F401
    except (ImportError, OSError) as exc:
        return f"the JACK-Client package or libjack cannot be loaded ({exc})"
    try:
        import sounddevice  # noqa: F401
    except (ImportError, OSError) as exc:
        return f"sounddevice / PortAudio cannot be loaded ({exc})"
    return None


def need_jack() -> None:
    """Skip (locally) or fail (in CI) when the JACK path cannot run."""
    why = _unavailable()
    if why is None:
        return
    msg = f"audio path through JACK not tested: {why}; to enable: {HOW_TO_ENABLE}"
    if os.environ.get("CI"):
        pytest.fail(msg + " (CI must run these tests)", pytrace=False)
    pytest.skip(msg)


def _child_setup() -> None:
    """In the child before exec: die with the test process (Linux PR_SET_PDEATHSIG), so
    nothing outlives a killed test run."""
    try:
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGTERM)      # PR_SET_PDEATHSIG = 1
    except (OSError, AttributeError):
        pass


def _stop(proc: subprocess.Popen | None, timeout: float = 3.0) -> None:
    """Terminate a process group started with start_new_session, then kill it."""
    if proc is None or proc.poll() is not None:
        return
    for sig, wait in ((signal.SIGTERM, timeout), (signal.SIGKILL, timeout)):
        try:
            os.killpg(proc.pid, sig)
        except ProcessLookupError:
            return
        try:
            proc.wait(wait)
            return
        except subprocess.TimeoutExpired:
            continue


class Board:
    """A running `harness.jackboard` process and its control pipe."""

    def __init__(self, model: Path, server: str, log_dir: Path, name: str = "board"):
        self.model = Path(model)
        self.name = name
        self.dirty = False
        self._stderr = open(log_dir / f"board-{uuid.uuid4().hex[:6]}.log", "w")
        self.proc = subprocess.Popen([sys.executable, "-m", "harness.jackboard", str(model), "--name", name,
                                      "--server", server],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=self._stderr,
                                     text=True, bufsize=1, start_new_session=True, cwd=str(ROOT),
                                     preexec_fn=_child_setup)
        line = self.proc.stdout.readline()
        if not line.startswith("ready "):
            self.stop()
            raise RuntimeError(f"the board process did not start: {line!r}; log {self._stderr.name}: "
                               f"{Path(self._stderr.name).read_text()[-2000:]}")
        self.info = json.loads(line[6:])

    def command(self, text: str) -> str:
        self.proc.stdin.write(text + "\n")
        self.proc.stdin.flush()
        answer = self.proc.stdout.readline().strip()
        if not answer or answer.startswith("error"):
            raise RuntimeError(f"board command {text!r}: {answer!r}")
        if text.split()[0] in ("stall", "disconnect"):
            self.dirty = True
        return answer

    def status(self) -> dict:
        return json.loads(self.command("status")[len("status "):])

    def stop(self) -> None:
        try:
            if self.proc.poll() is None and self.proc.stdin:
                self.proc.stdin.close()          # end of input: the board leaves by itself
                self.proc.wait(2)
        except (OSError, subprocess.TimeoutExpired):
            pass
        _stop(self.proc)
        self._stderr.close()


class JackRig:
    """A private JACK server, the board, and the wiring of the harness's stream.

    ``route`` decides how a newly opened PortAudio stream is wired (by the stream-open
    hook of harness.backends.audio, before the stream starts):

    * ``"board"``: output 1 -> board in; board out -> input 1; output 1 -> input 2
      (the reference: a direct loopback);
    * ``"loopback"``: output 1 -> input 1 and input 2 (the board replaced by a through
      connection, for a chain calibration);
    * ``"open"``: output 1 -> board in and input 2; nothing reaches input 1 (the cable
      from the board's output is not plugged);
    * ``"no-reference"``: as ``"board"`` without the loopback to input 2.
    """

    def __init__(self, tmp: Path):
        self.tmp = tmp
        self.server = f"harness-ci-{os.getpid()}-{uuid.uuid4().hex[:6]}"
        self._env_before = {k: os.environ.get(k) for k in
                            ("JACK_DEFAULT_SERVER", "JACK_NO_START_SERVER", "JACK_NO_AUDIO_RESERVATION")}
        os.environ.update(JACK_DEFAULT_SERVER=self.server, JACK_NO_START_SERVER="1",
                          JACK_NO_AUDIO_RESERVATION="1")
        self.jackd_log = tmp / "jackd.log"
        self._log = open(self.jackd_log, "w")
        self.mode, self.period = jackd_settings()
        self.board: Board | None = None
        self.route = "board"
        self.client = None
        self.jackd = None
        try:
            self._start()
        except BaseException:
            _stop(self.jackd)
            self._log.close()
            self._restore_env()
            raise

    def _start(self) -> None:
        import jack

        self._start_jackd()
        deadline = time.monotonic() + 15.0
        while True:
            if self.jackd.poll() is not None and "-R" in self.mode:
                # real-time scheduling refused after all: the server without it
                self.mode, self.period = ("--no-realtime",), max(self.period, 2048)
                self._start_jackd()
            elif self.jackd.poll() is not None:
                raise RuntimeError(f"jackd exited ({self.jackd.returncode}): {self.jackd_log.read_text()[-2000:]}")
            try:
                self.client = jack.Client("wiring", servername=self.server, no_start_server=True)
                break
            except jack.JackError:
                if time.monotonic() > deadline:
                    raise RuntimeError(f"jackd did not come up: {self.jackd_log.read_text()[-2000:]}") from None
                time.sleep(0.1)
        self.rescan()

    def _start_jackd(self) -> None:
        cmd = ["jackd", *self.mode, "-n", self.server, "-d", "dummy", "-r", str(JACK_RATE_HZ),
               "-p", str(self.period), "-C", "2", "-P", "2"]
        self._log.write(f"$ {' '.join(cmd)}\n")
        self._log.flush()
        self.jackd = subprocess.Popen(cmd, stdout=self._log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                      start_new_session=True, preexec_fn=_child_setup)

    # -- PortAudio ------------------------------------------------------------------
    @staticmethod
    def rescan() -> None:
        """Re-initialise PortAudio so it lists the JACK server's clients as devices."""
        import sounddevice as sd

        sd._terminate()
        sd._initialize()

    def portaudio_ports(self) -> tuple[list[str], list[str]]:
        """Input and output port names of the open PortAudio stream, in channel order
        (PortAudio numbers them on from earlier streams: in_2, in_3 ...)."""
        def order(p):
            tail = p.name.rsplit("_", 1)[-1]
            return int(tail) if tail.isdigit() else 0

        ports = self.client.get_ports("PortAudio.*", is_audio=True)
        ins = [p.name for p in sorted((p for p in ports if p.is_input), key=order)]
        outs = [p.name for p in sorted((p for p in ports if p.is_output), key=order)]
        return ins, outs

    # -- the board ------------------------------------------------------------------
    def start_board(self, model: Path) -> Board:
        """The board process running `model` (restarted when another model or a stalled /
        disconnected board is running)."""
        if self.board is not None and self.board.model == Path(model) and not self.board.dirty \
                and self.board.proc.poll() is None:
            self.board.command("reset")
            return self.board
        self.stop_board()
        self.board = Board(Path(model), self.server, self.tmp)
        return self.board

    def stop_board(self) -> None:
        if self.board is not None:
            self.board.stop()
            self.board = None

    # -- wiring -----------------------------------------------------------------------
    def hook(self, info: dict) -> None:
        """harness.backends.audio stream-open hook: wire the new stream by `route`."""
        self.rewire(self.route, settle_s=0.0)

    def rewire(self, route: str, settle_s: float = 0.3) -> None:
        """Wire the open PortAudio stream (disconnecting whatever it had): see the class.
        A running graph that changes may report an xrun: wait `settle_s` for it to pass."""
        self.route = route
        ins, outs = self.portaudio_ports()
        if not ins or not outs:
            raise RuntimeError(f"no PortAudio stream ports to wire: inputs {ins}, outputs {outs}")
        out0, in0, in1 = outs[0], ins[0], (ins[1] if len(ins) > 1 else None)
        for name in (out0, in0, in1):
            if name is None:
                continue
            for other in self.client.get_all_connections(name):
                if other.is_output:
                    self.client.disconnect(other, name)
                else:
                    self.client.disconnect(name, other)
        board_in = f"{self.board.name}:in_1" if self.board else None
        board_out = f"{self.board.name}:out_1" if self.board else None
        pairs = []
        if route in ("board", "no-reference"):
            pairs = [(out0, board_in), (board_out, in0)]
        elif route == "loopback":
            pairs = [(out0, in0)]
        elif route == "open":
            pairs = [(out0, board_in)]
        else:
            raise ValueError(route)
        if in1 is not None and route != "no-reference":
            pairs.append((out0, in1))
        for src, dst in pairs:
            if src is None or dst is None:
                raise RuntimeError(f"route {route!r} needs a running board")
            self.client.connect(src, dst)
        time.sleep(settle_s)

    def close(self) -> None:
        import sounddevice as sd

        try:
            self.stop_board()
        finally:
            try:
                if self.client is not None:
                    self.client.close()
            except Exception:
                pass
            # PortAudio must leave the server while it still runs: its JACK host API
            # aborts the process when it terminates against a vanished server
            sd._terminate()
            _stop(self.jackd)
            self._log.close()
            self._restore_env()
            sd._initialize()                   # PortAudio again, without the JACK server

    def _restore_env(self) -> None:
        for k, v in self._env_before.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


@pytest.fixture(scope="module")
def jack_rig(tmp_path_factory):
    """A private JACK server with the dummy driver at 48 kHz, the wiring client, PortAudio
    re-initialised to see it, and the stream-open hook installed."""
    need_jack()
    from harness.backends import audio

    rig = JackRig(tmp_path_factory.mktemp("jack"))
    import sounddevice as sd

    if not any("JACK" in api["name"] for api in sd.query_hostapis()):
        rig.close()
        msg = "audio path through JACK not tested: this PortAudio has no JACK host API (Debian's libportaudio2 has it)"
        if os.environ.get("CI"):
            pytest.fail(msg + " (CI must run these tests)", pytrace=False)
        pytest.skip(msg)
    old = audio.set_stream_open_hook(rig.hook)
    try:
        yield rig
    finally:
        audio.set_stream_open_hook(old)
        rig.close()
