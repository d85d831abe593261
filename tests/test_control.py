"""Board control over a serial port: against the simulated firmware (harness.board_firmware)
on a pseudo-terminal pair, started as a separate process, and against pyserial's
``loop://`` for bad replies (garbage, partial lines, silence, echo).

Outside references: pyserial's own port implementations (a real pty through
``serial.Serial`` and the ``loop://`` URL handler); the reply checks are this project's
contract (README), so the expectations are the documented messages.
"""

from __future__ import annotations

import json
import os
import select
import subprocess
import sys
import time
from pathlib import Path

import pytest
import serial

from harness.cli import main
from harness.control import BoardControl, BoardControlError, SerialControlConfig, parse_commands, prepare_board
from harness.errors import ConfigError, InvalidMeasurement
from harness.measure import run_from_files
from harness.profile import load_profile
from harness.station import load_station

pytest_plugins = ["pytester"]

ROOT = Path(__file__).resolve().parent.parent
FIX = ROOT / "fixtures"
NOTCH = FIX / "dut-notch50-nominal.toml"     # KN-50, firmware 2.1.0, id KN50-NOMINAL

COMMANDS = {"identity": "ID?", "serial": "SN?", "firmware": "FW?", "set_mode": "MODE {mode}",
            "get_mode": "MODE?", "set_gain": "GAIN {gain_db}", "get_gain": "GAIN?",
            "modes": ["notch", "bypass"], "gain_range_db": [-12.0, 12.0],
            "identity_pattern": "^(?P<manufacturer>[^,]+),(?P<model>.+)$", "serial_pattern": "^[A-Z0-9-]+$"}

COMMANDS_TOML = """
[station.control.commands]
identity = "ID?"
serial = "SN?"
firmware = "FW?"
set_mode = "MODE {mode}"
get_mode = "MODE?"
set_gain = "GAIN {gain_db}"
get_gain = "GAIN?"
modes = ["notch", "bypass"]
identity_pattern = '^(?P<manufacturer>[^,]+),(?P<model>.+)$'
"""


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(timeout=3)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=3)
    if proc.stdout is not None:
        proc.stdout.close()


@pytest.fixture
def firmware():
    """Start ``python -m harness.board_firmware --pty ...``; returns the slave path.
    Every process started is stopped at the end of the test, passed or failed."""
    procs: list[subprocess.Popen] = []

    def start(*args: str) -> str:
        proc = subprocess.Popen([sys.executable, "-m", "harness.board_firmware", "--pty", "--device", str(NOTCH),
                                 "--modes", "notch,bypass", "--max-lifetime-s", "120", *args],
                                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, cwd=ROOT,
                                env=dict(os.environ, PYTHONPATH=str(ROOT)))
        procs.append(proc)
        ready, _, _ = select.select([proc.stdout], [], [], 20)
        assert ready, "the firmware did not report its pty within 20 s"
        line = proc.stdout.readline().split()
        assert len(line) == 2 and line[0] == "PTY", line
        return line[1]

    try:
        yield start
    finally:
        for p in procs:
            _stop(p)


def config(port: str, timeout_s: float = 0.3, **commands) -> SerialControlConfig:
    return SerialControlConfig(port=port, commands=parse_commands(dict(COMMANDS, **commands)), timeout_s=timeout_s)


# --------------------------------------------------------------------------------------
# the simulated firmware on a pty
# --------------------------------------------------------------------------------------
def test_identity_modes_and_gain_through_a_pty(firmware):
    port = firmware()
    with BoardControl(config(port)) as board:
        ident = board.identity()
        assert ident == {"identity": "Kestrel Instruments (invented),KN-50", "model": "KN-50",
                         "manufacturer": "Kestrel Instruments (invented)", "serial": "KN50-NOMINAL",
                         "firmware": "2.1.0", "port": port}
        assert board.mode() == "notch"
        board.set_mode("bypass")
        assert board.mode() == "bypass"
        board.set_gain_db(-3.5)
        assert board.gain_db() == pytest.approx(-3.5)
        with pytest.raises(BoardControlError, match=r"mode 'wideband' is not one of the board's modes"):
            board.set_mode("wideband")                       # refused before anything is sent
        with pytest.raises(BoardControlError, match=r"outside the board's range -12\.\.12 dB"):
            board.set_gain_db(20.0)


def test_board_refusal_and_readback_mismatch(firmware):
    port = firmware("--gain-step-db", "0.5")
    with BoardControl(config(port, modes=["notch", "bypass", "wideband"], gain_tolerance_db=0.05)) as board:
        with pytest.raises(BoardControlError) as e:
            board.set_mode("wideband")                       # the map allows it, the board does not
        assert e.value.command == "MODE wideband" and "the board refused: 'ERR 2 unknown mode wideband'" in str(e.value)
        # the board rounds to 0.5 dB steps: 1.2 dB reads back as 1.0 dB
        with pytest.raises(BoardControlError, match=r"gain read back as 1 dB after setting 1.2 dB"):
            board.set_gain_db(1.2)


@pytest.mark.parametrize("kind,on,words", [
    ("silent", "MODE", ["no reply within 0.3 s (silence)", "'MODE bypass'"]),
    ("partial", "SN?", ["partial reply b'KN50-N'", "no line end", "'SN?'"]),
    ("garbage", "ID?", ["garbled reply", "not ASCII", "'ID?'"]),
    ("error", "GAIN", ["the board refused: 'ERR 9 simulated fault'", "'GAIN 1.0'"]),
    ("echo", "FW?", ["echo", "'FW?'"]),
])
def test_firmware_misbehaviour_gives_clear_errors(firmware, kind, on, words):
    port = firmware("--misbehave", kind, "--on", on)
    t0 = time.monotonic()
    with BoardControl(config(port)) as board:
        with pytest.raises(BoardControlError) as e:
            board.identity()
            board.set_mode("bypass")
            board.set_gain_db(1.0)
    msg = str(e.value)
    assert msg.startswith(f"board on {port}: "), msg
    for w in words:
        assert w in msg, (w, msg)
    assert time.monotonic() - t0 < 3


# --------------------------------------------------------------------------------------
# loop:// for bad replies
# --------------------------------------------------------------------------------------
class Scripted:
    """pyserial's loop:// port with a script: writing a command puts the scripted reply
    into the loop instead of the command itself (None: silence; missing: plain loop)."""

    def __init__(self, replies: dict[bytes, bytes | None], timeout_s: float = 0.2):
        self.port = serial.serial_for_url("loop://", timeout=timeout_s)
        self.replies = replies
        self.timeout = timeout_s

    def write(self, data: bytes) -> int:
        cmd = data.rstrip(b"\r\n")
        if cmd in self.replies:
            reply = self.replies[cmd]
            if reply:
                self.port.write(reply)
            return len(data)
        return self.port.write(data)             # unscripted: the loop echoes the command

    def __getattr__(self, name):
        return getattr(self.port, name)


@pytest.mark.parametrize("reply,words", [
    (b"\xff\xfe\x00garbage\n", ["garbled reply", "not ASCII"]),
    (b"Kestrel,KN-5", ["partial reply b'Kestrel,KN-5'", "no line end within 0.2 s"]),
    (None, ["no reply within 0.2 s (silence)"]),
    (b"\n", ["empty reply line"]),
    (b"Kes\x07trel,KN-50\r\n", ["garbled reply", "control characters"]),
    (b"ERR 7 busy\r\n", ["the board refused: 'ERR 7 busy'"]),
    (b"x" * 300 + b"\n", ["longer than 256 bytes"]),
    (b"no comma here\n", ["unexpected reply 'no comma here'", "identity_pattern"]),
])
def test_bad_replies_on_loop(reply, words):
    port = Scripted({b"ID?": reply})
    t0 = time.monotonic()
    board = BoardControl(config("loop://", timeout_s=0.2), port=port)
    with pytest.raises(BoardControlError) as e:
        board.identity()
    assert e.value.port == "loop://" and e.value.command == "ID?"
    assert isinstance(e.value, InvalidMeasurement)
    for w in words:
        assert w in str(e.value), (w, str(e.value))
    assert time.monotonic() - t0 < 1.5


def test_plain_loop_is_an_echo_and_stale_bytes_are_dropped():
    board = BoardControl(config("loop://", timeout_s=0.2)).open()
    try:
        with pytest.raises(BoardControlError, match="the reply is the command itself"):
            board.identity()
    finally:
        board.close()
    port = Scripted({b"SN?": b"KN50-0002\r\n"})
    port.port.write(b"stale line from before\n")        # must not pass for the reply
    board = BoardControl(config("loop://"), port=port)
    assert board.query("serial") == "KN50-0002"


def test_unopenable_port():
    with pytest.raises(BoardControlError, match=r"cannot open serial port /nonexistent/ttyUSB9"):
        BoardControl(config("/nonexistent/ttyUSB9")).open()


# --------------------------------------------------------------------------------------
# station files and the measurement
# --------------------------------------------------------------------------------------
def station_text(port: str, *, extra: str = "", commands: str = COMMANDS_TOML) -> str:
    return f"""
[station]
id = "sim-notch-control"
backend = "simulated"
device_model = "{NOTCH}"
sample_rate_hz = 48000
reference_channel = true
max_output_dbfs = -3.0
[station.control]
port = "{port}"
baud = 115200
timeout_s = 0.5
{extra}
{commands}
"""


PROFILE = """
schema = 1
[profile]
id = "kn50-quick"
revision = "t"
sample_rate_hz = 48000
reference_hz = 1000
[[band]]
kind = "pass"
start_hz = 200
stop_hz = 10000
min_db = -0.5
max_db = 0.5
[stimulus]
method = "multitone"
points_per_decade = 4
level_dbfs = -12
periods = 4
transient_periods = 2
period_samples = 4096
settle_s = 0.01
{control}
"""


def test_station_control_parsing(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text(station_text("/dev/ttyUSB0"))
    cfg = load_station(p).section("control")
    assert (cfg.port, cfg.baud, cfg.timeout_s, cfg.check_serial) == ("/dev/ttyUSB0", 115200, 0.5, True)
    assert cfg.commands.modes == ("notch", "bypass")
    bad = [
        (station_text("x", extra='line_ending = "\\t"'), "station.control.line_ending"),
        (station_text("x", commands=COMMANDS_TOML.replace("MODE {mode}", "MODE {name}")),
         "station.control.commands.set_mode"),
        (station_text("x", commands=COMMANDS_TOML.replace('get_mode = "MODE?"\n', "")),
         "station.control.commands.get_mode"),
        (station_text("x", extra='commands = "missing-board-map.toml"', commands=""), "station.control.commands"),
        (station_text("x", extra="baudrate = 9600"), "station.control.baudrate"),
    ]
    for text, key in bad:
        p.write_text(text)
        with pytest.raises(ConfigError) as e:
            load_station(p)
        assert e.value.file == str(p) and e.value.key == key, (key, e.value)
    # a command map in its own file, relative to the station file
    (tmp_path / "board.toml").write_text(COMMANDS_TOML.replace("[station.control.commands]", ""))
    p.write_text(station_text("/dev/ttyUSB0", extra='commands = "board.toml"', commands=""))
    assert load_station(p).section("control").commands.file == str(tmp_path / "board.toml")


def test_run_sets_the_profiles_mode_and_records_the_board(firmware, tmp_path):
    port = firmware()
    st = tmp_path / "station.toml"
    st.write_text(station_text(port))
    prof = tmp_path / "p.toml"
    prof.write_text(PROFILE.format(control='[control]\nmode = "bypass"\ngain_db = 0.0'))
    res = run_from_files(prof, st, "KN50-NOMINAL", out_dir=tmp_path / "out")
    assert res.verdict == "pass", res.reasons
    unit = json.loads(res.json_path.read_text())["unit"]
    assert unit["serial"] == "KN50-NOMINAL"
    assert (unit["model"], unit["firmware"], unit["board_serial"], unit["mode"], unit["gain_db"]) == \
        ("KN-50", "2.1.0", "KN50-NOMINAL", "bypass", 0.0)
    assert unit["control_port"] == port
    # the board now reports the mode the profile asked for
    with BoardControl(config(port)) as board:
        assert board.mode() == "bypass"


def test_profile_carries_the_products_command_map(firmware, tmp_path):
    """The board's command language can come with the product's profile: the station's
    map is then replaced (here the station's map is broken on purpose)."""
    port = firmware()
    st = tmp_path / "station.toml"
    st.write_text(station_text(port, commands=COMMANDS_TOML.replace('identity = "', 'identity = "X')))
    (tmp_path / "kn50-commands.toml").write_text(COMMANDS_TOML.replace("[station.control.commands]", ""))
    prof = tmp_path / "p.toml"
    prof.write_text(PROFILE.format(control='[control]\nmode = "notch"\ncommands = "kn50-commands.toml"'))
    res = run_from_files(prof, st, "KN50-NOMINAL", out_dir=tmp_path / "out")
    assert res.verdict == "pass", res.reasons
    assert json.loads(res.json_path.read_text())["unit"]["mode"] == "notch"
    # a bad map in the profile names the profile file and key
    prof.write_text(PROFILE.format(control='[control]\nmode = "notch"\ncommands = "nope.toml"'))
    with pytest.raises(ConfigError) as e:
        run_from_files(prof, st, "KN50-NOMINAL", out_dir=tmp_path / "out")
    assert e.value.key == "control.commands" and "not found" in str(e.value)


def test_run_refuses_a_board_that_cannot_be_set(firmware, tmp_path, capsys):
    port = firmware()
    st = tmp_path / "station.toml"
    st.write_text(station_text(port, commands=COMMANDS_TOML.replace('["notch", "bypass"]',
                                                                    '["notch", "bypass", "wideband"]')))
    prof = tmp_path / "p.toml"
    prof.write_text(PROFILE.format(control='[control]\nmode = "wideband"'))
    out = tmp_path / "out"
    code = main(["run", str(prof), "--station", str(st), "--serial", "KN50-NOMINAL", "--out", str(out)])
    assert code == 4
    assert "the board refused: 'ERR 2 unknown mode wideband' to 'MODE wideband'" in capsys.readouterr().err
    assert not out.exists()                              # nothing was measured
    # a serial that is not the board's
    prof.write_text(PROFILE.format(control='[control]\nmode = "bypass"'))
    with pytest.raises(BoardControlError, match=r"reports serial 'KN50-NOMINAL' but the unit was given as 'KN50-9'"):
        run_from_files(prof, st, "KN50-9", out_dir=out)


def test_profile_mode_without_board_control(tmp_path):
    prof = tmp_path / "p.toml"
    prof.write_text(PROFILE.format(control='[control]\nmode = "bypass"'))
    profile = load_profile(prof)
    st = tmp_path / "s.toml"
    st.write_text(station_text("x").split("[station.control]")[0])
    sim = load_station(st)
    assert prepare_board(sim, profile, "A")["board_settings"]["applied"] is False
    import dataclasses

    hw = dataclasses.replace(sim, backend="visa")
    with pytest.raises(InvalidMeasurement, match=r"requires board settings .* has no \[station.control\]"):
        prepare_board(hw, profile, "A")


def test_processes_are_stopped_when_a_test_fails(pytester):
    """The firmware fixture stops its process even when the test using it fails (the
    instrument servers' fixture in test_visa.py is built the same way)."""
    pidfile = pytester.path / "pid"
    pytester.makepyfile(test_inner=f"""
import sys
sys.path.insert(0, {str(Path(__file__).parent)!r})
from test_control import firmware   # the fixture under test

def test_fails(firmware):
    import os, pathlib
    port = firmware()
    assert os.path.exists(port)
    def parent(p):
        try:
            return int(open(f"/proc/{{p}}/stat").read().rsplit(")", 1)[1].split()[1])
        except (OSError, ValueError, IndexError):
            return -1
    pids = [p for p in os.listdir("/proc") if p.isdigit() and parent(p) == os.getpid()]
    pathlib.Path({str(pidfile)!r}).write_text(" ".join(pids))
    assert False, "a failing test"
""")
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(failed=1)
    pids = [int(p) for p in pidfile.read_text().split()]
    assert pids
    for pid in pids:
        alive = Path(f"/proc/{pid}").exists() and "Z" not in Path(f"/proc/{pid}/stat").read_text().split()[2]
        assert not alive, f"firmware process {pid} still running after the failed test"
