"""Production-line mode (harness.line, `harness line`).

The line measures simulated KF-8 boards (fixtures/station-line-48k.toml, an analog
4th-order Butterworth low-pass at 8 kHz per unit, drawn with component spread). Outside
references: each unit's verdict is checked against its true response computed here with
scipy.signal (butter + freqs, the textbook analog prototype) and the mask limits; the
store's counts are recomputed here from its rows; digests with hashlib; the serial-port
scanner is read through pyserial's own ``loop://`` port.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import signal
from pathlib import Path

import numpy as np
import pytest

from harness import line as ln
from harness import store as st
from harness.cli import main
from harness.errors import ConfigError, InvalidMeasurement

ROOT = Path(__file__).resolve().parents[1]
PROFILE = ROOT / "fixtures" / "profile-line-kf8.toml"
STATION_FIXTURE = ROOT / "fixtures" / "station-line-48k.toml"
DUT = ROOT / "fixtures" / "dut-kf8-line.toml"


def station(tmp_path: Path, *, line: str = "", top: str = "", simulate: str | None = None) -> Path:
    """A line station file in tmp_path (KF-8 board, 48 kS/s, reference channel)."""
    sim = simulate if simulate is not None else "seed = 2612\ncutoff_pct = 1.0\ngain_db = 0.04\nout_of_tolerance = 0.0\n"
    text = f"""
[station]
id = "line-t"
backend = "simulated"
device_model = "{DUT}"
sample_rate_hz = 48000
reference_channel = true
max_output_dbfs = -6.0
chain_latency_samples = 128
max_latency_samples = 1024
{top}
[line]
plots = "never"
{line}
[line.simulate]
{sim}
"""
    f = tmp_path / "station.toml"
    f.write_text(text)
    return f


def quiet_ui(json_lines=False):
    return ln.LineUI(io.StringIO(), io.StringIO(), json_lines=json_lines, colour=False)


def run(tmp_path, serials, stn=None, **kw):
    kw.setdefault("lot", "L1")
    kw.setdefault("operator", "op")
    ui = kw.pop("ui", None) or quiet_ui()
    res = ln.run_line(PROFILE, stn or station(tmp_path), source=ln.ListSource(serials), ui=ui,
                      out_dir=tmp_path / "out", **kw)
    return res, ui


def stored(tmp_path) -> list[dict]:
    with st.open_store(tmp_path / "out" / "harness-results.sqlite", readonly=True) as s:
        assert s.check() == []
        return s.attempts()


class Faulty:
    """A backend that behaves like `inner` but can send this process SIGINT while it
    plays, `interrupts` times (what an operator's Ctrl-C does)."""

    def __init__(self, inner, interrupts=0):
        self.inner, self.interrupts = inner, interrupts
        self.sample_rate_hz, self.has_reference = inner.sample_rate_hz, inner.has_reference

    def identity(self):
        return self.inner.identity()

    def play_and_capture(self, stimulus, *, extra_samples=0):
        for _ in range(self.interrupts):
            os.kill(os.getpid(), signal.SIGINT)
        return self.inner.play_and_capture(stimulus, extra_samples=extra_samples)

    def close(self):
        self.inner.close()


def board(stn_path, serial, attempt_no, *, fault="none", **imperfections):
    """The simulated board of `serial`, optionally with a fault / other imperfections."""
    import dataclasses

    from harness.station import load_station

    s = load_station(stn_path)
    b = ln.simulated_board_for(s, s.section("line").simulate, serial, attempt_no)
    if fault != "none" or imperfections:
        imp = dataclasses.replace(b.device.imperfections, fault=fault, **imperfections)
        b = type(b)(dataclasses.replace(b.device, imperfections=imp), s.sample_rate_hz, reference_channel=True,
                    chain_latency_samples=s.chain_latency_samples, seed=attempt_no)
    return b


# --------------------------------------------------------------------------------------
# the loop
# --------------------------------------------------------------------------------------
def test_unattended_line_verdicts_match_the_true_response_and_every_attempt_is_recorded(tmp_path):
    from scipy import signal as sps

    stn = station(tmp_path, simulate="seed = 7\ncutoff_pct = 1.0\ngain_db = 0.04\nout_of_tolerance = 0.3\n")
    serials = [f"KF8-T-{i:03d}" for i in range(1, 13)]
    res, ui = run(tmp_path, serials, stn)
    rows = stored(tmp_path)
    # counts recomputed from the store
    by = {}
    for r in rows:
        by.setdefault(r["serial"], []).append(r)
    assert sorted(by) == serials and len(rows) == res.counts.attempts
    final = {s: rs[-1]["verdict"] for s, rs in by.items()}
    assert res.counts.passed == sum(v == "pass" for v in final.values())
    assert res.counts.first_pass == sum(rs[0]["verdict"] == "pass" for rs in by.values())
    assert res.exit_code == (0 if all(v == "pass" for v in final.values()) else 1)
    assert 0 < res.counts.passed < len(serials), "the lot should hold passing and failing boards"
    from harness.station import load_station

    s = load_station(stn)
    checked = 0
    for serial, rs in by.items():
        # retest policy: a retest only after a non-pass verdict, at most 1 + retests attempts
        assert [r["attempt_no"] for r in rs] == list(range(1, len(rs) + 1)) and len(rs) <= 2
        assert all(r["verdict"] != "pass" for r in rs[:-1])
        for r in rs:
            data = Path(r["certificate_file"]).read_bytes()
            assert hashlib.sha256(data).hexdigest() == r["certificate_sha256"]
            assert json.loads(data)["verdict"] == r["verdict"] and r["lot"] == "L1" and r["operator"] == "op"
        # the board's true response: the textbook analog Butterworth at its drawn cutoff
        model = ln.simulated_board_for(s, s.section("line").simulate, serial, 1).device
        d = model.filter.design
        b, a = sps.butter(d.order, 2 * np.pi * d.cutoff_hz, btype="low", analog=True)
        cert = json.loads(Path(rs[0]["certificate_file"]).read_text())
        f = np.array([p["frequency_hz"] for p in cert["points"]])
        _, h = sps.freqs(b, a, worN=2 * np.pi * f)
        true_db = 20 * np.log10(np.abs(h)) + model.imperfections.gain_error_db
        lo = np.array([-np.inf if p["limit_low_db"] is None else p["limit_low_db"] for p in cert["points"]])
        hi = np.array([np.inf if p["limit_high_db"] is None else p["limit_high_db"] for p in cert["points"]])
        U = np.array([p["U_gain_db"] for p in cert["points"]])
        margin = np.minimum(true_db - lo, hi - true_db)
        if np.any(margin < -3 * U - 0.01):
            assert final[serial] == "fail", serial
            checked += 1
        elif np.all(margin > 3 * U + 0.01):
            assert final[serial] == "pass", serial
            checked += 1
    assert checked >= 10
    text = ui.human.getvalue()
    assert "#####" in text and "yield" in text and "worst point" in text


def test_a_retest_after_a_bad_contact_is_recorded_and_first_pass_yield_counts_it(tmp_path):
    stn = station(tmp_path)

    def factory(s, serial, attempt_no):
        return board(stn, serial, attempt_no, fault="open" if (serial == "KF8-B" and attempt_no == 1) else "none")

    res, _ = run(tmp_path, ["KF8-A", "KF8-B", "KF8-C"], stn, backend_factory=factory)
    rows = stored(tmp_path)
    assert [(r["serial"], r["attempt_no"], r["verdict"]) for r in rows] == [
        ("KF8-A", 1, "pass"), ("KF8-B", 1, "invalid"), ("KF8-B", 2, "pass"), ("KF8-C", 1, "pass")]
    assert res.counts.n_units == 3 and res.counts.passed == 3 and res.counts.first_pass == 2
    assert res.counts.yield_pct() == 100.0 and res.counts.fpy_pct() == pytest.approx(200 / 3)
    assert res.exit_code == 0


def test_duplicate_serials_are_flagged_and_refused_unless_allowed(tmp_path):
    stn = station(tmp_path)
    run(tmp_path, ["KF8-D1"], stn)
    res, ui = run(tmp_path, ["KF8-D1", "KF8-D2"], stn, ui=quiet_ui(json_lines=True))
    assert "DUPLICATE SERIAL KF8-D1" in ui.human.getvalue()
    events = [json.loads(x) for x in ui.out.getvalue().splitlines()]
    assert [e for e in events if e["event"] == "duplicate"][0]["serial"] == "KF8-D1"
    assert [(r["serial"], r["duplicate"]) for r in stored(tmp_path)] == [("KF8-D1", 0), ("KF8-D2", 0)]
    res, _ = run(tmp_path, ["KF8-D1"], stn, allow_duplicates=True)
    rows = stored(tmp_path)
    assert [(r["serial"], r["attempt_no"], r["duplicate"]) for r in rows][-1] == ("KF8-D1", 2, 1)
    with st.open_store(tmp_path / "out" / "harness-results.sqlite", readonly=True) as s:
        assert sum(e["kind"] == "duplicate" for e in s.events()) == 2


def test_a_unit_rejected_at_the_retest_prompt_can_be_retested_later_within_the_policy(tmp_path):
    stn = station(tmp_path)
    answers = iter(["KF8-R", "n", ""])                # serial, reject at the retest prompt, finish
    prompts = []

    def ask(prompt):
        prompts.append(prompt)
        return next(answers)

    def factory(s, serial, attempt_no):
        return board(stn, serial, attempt_no, fault="open" if attempt_no == 1 else "none")

    res = ln.run_line(PROFILE, stn, source=ln.KeyboardSource(ask), ui=quiet_ui(), out_dir=tmp_path / "out",
                      lot="L1", operator="op", backend_factory=factory)
    assert any("RETEST 1 of 1" in p for p in prompts)
    assert res.counts.final()["invalid"] == 1
    # scanned again later: the retest the policy allows (attempt 2), then no more
    res, _ = run(tmp_path, ["KF8-R", "KF8-R"], stn, backend_factory=factory)
    rows = stored(tmp_path)
    assert [(r["attempt_no"], r["verdict"]) for r in rows] == [(1, "invalid"), (2, "pass")]


def test_operator_and_lot_are_asked_for_or_required(tmp_path, capsys):
    stn = station(tmp_path)
    answers = iter(["", "Ana", "L-77", ""])          # empty operator refused, then a name; lot; finish
    res = ln.run_line(PROFILE, stn, source=ln.KeyboardSource(lambda p: next(answers)), ui=quiet_ui(),
                      out_dir=tmp_path / "out")
    assert res.exit_code == 0 and res.counts.n_units == 0
    with st.open_store(tmp_path / "out" / "harness-results.sqlite", readonly=True) as s:
        with s.engine.connect() as c:
            assert c.exec_driver_sql("SELECT operator, lot FROM sessions").one() == ("Ana", "L-77")
    serials = tmp_path / "s.txt"
    serials.write_text("KF8-X\n")
    assert main(["line", str(PROFILE), "--station", str(stn), "--serials", str(serials), "--out",
                 str(tmp_path / "o2"), "--lot", "L1"]) == 2
    assert "--operator" in capsys.readouterr().err


def test_bad_serials_are_refused_and_logged(tmp_path):
    stn = station(tmp_path, line='serial_pattern = "KF8-[0-9]{4}"')
    res, ui = run(tmp_path, ["KF8-12", "KF8-\x1b[2J", "x" * 80, "KF8-0001"], stn)
    assert res.counts.n_units == 1
    text = ui.human.getvalue()
    assert "serial_pattern" in text and "control characters" in text and "longer than 64" in text
    with st.open_store(tmp_path / "out" / "harness-results.sqlite", readonly=True) as s:
        assert sum(e["kind"] == "serial-refused" for e in s.events()) == 3


def test_machine_readable_output_is_one_json_object_per_line(tmp_path):
    res, ui = run(tmp_path, ["KF8-J1", "KF8-J2"], ui=quiet_ui(json_lines=True))
    events = [json.loads(x) for x in ui.out.getvalue().splitlines()]
    assert [e["event"] for e in events] == ["start", "attempt", "attempt", "summary"]
    a = events[1]
    assert a["serial"] == "KF8-J1" and a["verdict"] == "pass" and a["exit_code"] == 0
    assert set(a["worst"]) == {"frequency_hz", "gain_db", "limit_low_db", "limit_high_db", "margin_db", "U_gain_db"}
    assert hashlib.sha256(Path(a["certificate"]).read_bytes()).hexdigest() == a["certificate_sha256"]
    assert events[-1]["units"] == 2 and events[-1]["exit_code"] == 0
    assert "PASS" in ui.human.getvalue() or "####" in ui.human.getvalue()


def test_serial_port_scanner_through_pyserial(tmp_path):
    import serial

    port = serial.serial_for_url("loop://", timeout=0.05)
    port.write(b"KF8-S1\r\nKF8-S2\n")
    src = ln.SerialPortSource("loop://", serial_obj=port, out=io.StringIO())
    res = ln.run_line(PROFILE, station(tmp_path), source=src, ui=quiet_ui(), out_dir=tmp_path / "out",
                      lot="L1", operator="op", max_units=2)
    assert [r["serial"] for r in stored(tmp_path)] == ["KF8-S1", "KF8-S2"] and res.exit_code == 0


# --------------------------------------------------------------------------------------
# refusing to start, stopping, Ctrl-C
# --------------------------------------------------------------------------------------
def test_refuses_to_start_on_an_expired_calibration(tmp_path, capsys):
    cal = tmp_path / "cal.json"
    cal.write_text(json.dumps({"station_id": "line-t", "id": "cal-old", "due_utc": "2020-01-01T00:00:00Z",
                               "sample_rate_hz": 48000.0}))
    stn = station(tmp_path, top=f'[calibration]\nfile = "{cal}"\n')
    with pytest.raises(InvalidMeasurement, match="expired"):
        run(tmp_path, ["KF8-C1"], stn)
    serials = tmp_path / "s.txt"
    serials.write_text("KF8-C1\n")
    assert main(["line", str(PROFILE), "--station", str(stn), "--serials", str(serials), "--out",
                 str(tmp_path / "out"), "--lot", "L", "--operator", "o"]) == 4
    assert "expired" in capsys.readouterr().err
    assert not (tmp_path / "out" / "harness-results.sqlite").exists()      # nothing started


def test_a_calibration_expiring_during_the_shift_stops_the_line(tmp_path, monkeypatch):
    import harness.calibration as hc

    calls = {"n": 0}

    def fake(station, now=None):
        calls["n"] += 1
        if calls["n"] > 3:
            raise InvalidMeasurement("calibration cal-x of station line-t expired on 2026-01-01T00:00:00Z")
        return None, {"id": "cal-x", "due_utc": "2099-01-01T00:00:00Z", "created_utc": "x", "file": "c.json"}

    monkeypatch.setattr(hc, "load_calibration", fake)
    with pytest.raises(InvalidMeasurement, match="expired"):
        run(tmp_path, ["KF8-E1", "KF8-E2", "KF8-E3", "KF8-E4"])
    rows = stored(tmp_path)
    assert [r["serial"] for r in rows] == ["KF8-E1", "KF8-E2"] and rows[0]["calibration_id"] == "cal-x"


def test_golden_unit_check_gates_the_start(tmp_path):
    """The golden unit (the station's nominal KF-8 board) is measured before the first
    unit and compared with its stored response (harness.golden): a stored response 0.4 dB
    off at one point (beyond the 0.05 dB tolerance) keeps the line from starting."""
    from harness.golden import golden_from_certificate, write_golden
    from harness.measure import make_backend, measure_unit
    from harness.profile import load_profile
    from harness.station import load_station

    stn = station(tmp_path)
    s, prof = load_station(stn), load_profile(PROFILE)
    ref = measure_unit(prof, s, "KF8-GOLD-1", backend=make_backend(s), out_dir=tmp_path / "golden-ref",
                       write_plot=False)
    good = write_golden(golden_from_certificate(ref.json_path, tolerance_gain_db=0.05), tmp_path / "good.json")
    doc = golden_from_certificate(ref.json_path, tolerance_gain_db=0.05)
    doc["points"][4]["gain_db"] += 0.4
    bad = write_golden(doc, tmp_path / "bad.json")
    with pytest.raises(InvalidMeasurement, match=r"golden-unit check failed.*gain differs by -0\.4"):
        run(tmp_path, ["KF8-G1"], stn, golden=bad)
    with st.open_store(tmp_path / "out" / "harness-results.sqlite", readonly=True) as store:
        assert store.counts()["attempts"] == 0 and store.counts()["sessions"] == 0
        (ev,) = store.events()
        assert ev["kind"] == "golden-check" and json.loads(ev["detail"])["verdict"] == "not verified"
    res, ui = run(tmp_path, ["KF8-G1"], stn, golden=good)
    assert res.counts.passed == 1 and "station verified" in ui.human.getvalue()
    assert [r["serial"] for r in stored(tmp_path)] == ["KF8-G1"]       # the golden unit is no unit


def test_a_board_that_cannot_be_prepared_is_not_measured_and_logged(tmp_path, monkeypatch):
    import harness.control as hc

    def prepare(station, profile, serial):
        if serial == "KF8-W2":
            raise hc.BoardControlError("loop://", "SN?", "board reports serial 'KF8-W9' but the unit was given "
                                                         "as 'KF8-W2'; refused")
        return {"board_serial": serial}

    monkeypatch.setattr(hc, "prepare_board", prepare)
    res, ui = run(tmp_path, ["KF8-W1", "KF8-W2", "KF8-W3"])
    rows = stored(tmp_path)
    assert [r["serial"] for r in rows] == ["KF8-W1", "KF8-W3"]
    assert json.loads(Path(rows[0]["certificate_file"]).read_text())["unit"]["board_serial"] == "KF8-W1"
    assert "board control" in ui.human.getvalue() and "KF8-W9" in ui.human.getvalue()
    with st.open_store(tmp_path / "out" / "harness-results.sqlite", readonly=True) as s:
        assert [e["serial"] for e in s.events() if e["kind"] == "board-control"] == ["KF8-W2"]


def test_repeated_invalid_measurements_stop_the_line(tmp_path):
    stn = station(tmp_path, line="retests = 0\nstop_after_invalid = 2")
    res, ui = run(tmp_path, [f"KF8-V{i}" for i in range(5)], stn,
                  backend_factory=lambda s, serial, n: board(stn, serial, n, fault="dead"))
    assert res.exit_code == 4 and "invalid measurements in a row" in res.stopped_because
    assert [r["verdict"] for r in stored(tmp_path)] == ["invalid", "invalid"]


def test_first_ctrl_c_finishes_the_unit_in_flight_then_stops(tmp_path):
    stn = station(tmp_path)

    def factory(s, serial, attempt_no):
        return Faulty(board(stn, serial, attempt_no), interrupts=1 if serial == "KF8-I2" else 0)

    res, ui = run(tmp_path, ["KF8-I1", "KF8-I2", "KF8-I3"], stn, backend_factory=factory)
    rows = stored(tmp_path)
    assert [(r["serial"], r["verdict"]) for r in rows] == [("KF8-I1", "pass"), ("KF8-I2", "pass")]
    assert "Ctrl-C" in res.stopped_because and res.exit_code == 0
    assert all(Path(r["certificate_file"]).is_file() for r in rows)
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler      # handler restored


def test_second_ctrl_c_abandons_the_unit_and_records_that(tmp_path):
    stn = station(tmp_path)

    def factory(s, serial, attempt_no):
        return Faulty(board(stn, serial, attempt_no), interrupts=2 if serial == "KF8-I2" else 0)

    res, ui = run(tmp_path, ["KF8-I1", "KF8-I2", "KF8-I3"], stn, backend_factory=factory)
    rows = stored(tmp_path)
    assert [(r["serial"], r["verdict"]) for r in rows] == [("KF8-I1", "pass"), ("KF8-I2", "abandoned")]
    assert rows[1]["certificate_file"] is None and rows[1]["n_points"] == 0
    assert "abandoned" in res.stopped_because and res.exit_code == 1
    assert "ABANDONED" in ui.human.getvalue()
    with st.open_store(tmp_path / "out" / "harness-results.sqlite", readonly=True) as s:
        kinds = [e["kind"] for e in s.events()]
    assert kinds[0] == "session-start" and "abandoned" in kinds and kinds[-1] == "session-end"


def test_ctrl_c_while_waiting_for_a_serial_finishes_cleanly(tmp_path):
    def ask(prompt):
        raise KeyboardInterrupt

    res = ln.run_line(PROFILE, station(tmp_path), source=ln.KeyboardSource(ask), ui=quiet_ui(),
                      out_dir=tmp_path / "out", lot="L", operator="o")
    assert res.exit_code == 0 and res.counts.n_units == 0 and "operator" in res.stopped_because


def test_an_attempt_the_store_cannot_take_is_spooled_and_recorded_on_the_next_start(tmp_path, monkeypatch):
    from sqlalchemy.exc import OperationalError

    real = st.Store.record_attempt
    state = {"fail": True}

    def flaky(self, attempt, **kw):
        if state["fail"] and attempt.row["serial"] == "KF8-P2":
            raise OperationalError("INSERT", {}, Exception("server closed the connection unexpectedly"))
        return real(self, attempt, **kw)

    monkeypatch.setattr(st.Store, "record_attempt", flaky)
    stn = station(tmp_path)
    res, ui = run(tmp_path, ["KF8-P1", "KF8-P2", "KF8-P3"], stn)
    assert res.exit_code == 4 and "unreachable" in res.stopped_because
    spooled = list((tmp_path / "out" / "unrecorded").glob("*.json"))
    assert len(spooled) == 1 and "KF8-P2" in spooled[0].read_text()
    assert [r["serial"] for r in stored(tmp_path)] == ["KF8-P1"]
    state["fail"] = False
    res, ui = run(tmp_path, ["KF8-P3"], stn)
    assert "recorded 1 attempt(s)" in ui.human.getvalue()
    assert [r["serial"] for r in stored(tmp_path)] == ["KF8-P1", "KF8-P2", "KF8-P3"]


# --------------------------------------------------------------------------------------
# configuration and display
# --------------------------------------------------------------------------------------
def test_retest_policy_precedence_and_bad_line_sections(tmp_path):
    from harness.profile import load_profile
    from harness.station import load_station

    prof_text = PROFILE.read_text() + '\n[line]\nretests = 2\nretest_on = ["fail"]\n'
    pf = tmp_path / "p.toml"
    pf.write_text(prof_text)
    prof = load_profile(pf)
    assert ln.retest_policy(prof, None) == ln.RetestPolicy(2, ("fail",), "prompt")
    s = load_station(station(tmp_path, line='retests = 0\nretest_mode = "immediate"'))
    assert ln.retest_policy(prof, s.section("line")) == ln.RetestPolicy(0, ("fail",), "immediate")
    assert ln.retest_policy(prof, s.section("line"), retests=3).retests == 3
    for bad, match in (('retests = 11', r"line\.retests: must be at most 10"),
                       ('retest_on = ["pass"]', r"line\.retest_on\[0\]: unknown verdict"),
                       ('duplicates = "ignore"', r"line\.duplicates: unknown value"),
                       ('serial_pattern = "("', r"line\.serial_pattern: not a regular expression"),
                       ('retestz = 1', r"line\.retestz: unknown key; did you mean 'retests'")):
        with pytest.raises(ConfigError, match=match):
            load_station(station(tmp_path, line=bad))
    with pytest.raises(ConfigError, match=r"line\.simulate\.cutof_pct: unknown key"):
        load_station(station(tmp_path, simulate="cutof_pct = 1.0"))
    pf.write_text(PROFILE.read_text() + "\n[line]\nplots = \"always\"\n")          # station-only key
    with pytest.raises(ConfigError, match=r"line\.plots: unknown key"):
        ln.retest_policy(load_profile(pf), None)


def test_verdict_banner_is_large_and_coloured_only_on_a_terminal():
    rows = ln.verdict_banner("fail").splitlines()
    assert len(rows) == 7 and max(len(r) for r in rows) >= 20
    assert "\033[" not in ln.verdict_banner("pass")
    assert ln.verdict_banner("pass", colour=True).startswith("\033[1;97;42m")
    for word in ("pass", "fail", "inconclusive", "invalid"):
        assert all(set(r) <= {"#", " "} for r in ln.big_word(word))


def test_the_shipped_line_station_runs_a_small_line_from_the_command_line(tmp_path, capsys):
    serials = tmp_path / "serials.txt"
    serials.write_text("# KF-8 lot 2612\nKF8-2612-0002\nKF8-2612-0003\n\n")
    code = main(["line", str(PROFILE), "--station", str(STATION_FIXTURE), "--serials", str(serials),
                 "--out", str(tmp_path / "line-out"), "--lot", "L2612", "--operator", "ana"])
    out = capsys.readouterr().out
    assert code in (0, 1) and "line finished" in out and "2 units" in out
    assert (tmp_path / "line-out" / "harness-results.sqlite").is_file()
