"""The harness pytest plugin (harness.pytest_plugin): options, markers, fixtures, the
short-certificate failure message, JUnit XML properties, fixed-point checks.

Most tests run a small pytest project with pytester, as a team would: a profile file, the
firmware's exported coefficients and a test module. Reference values come from
scipy.signal (the filters' exact responses) and numpy (fixed-point rounding, roots).
"""

import json
import re
import shutil
import textwrap
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

from harness.design import load_coefficients
from harness.errors import ConfigError
from harness.profile import load_profile
from harness.pytest_compliance import (SIM_RATES_HZ, ComplianceFailure, ComplianceResult, assert_compliant,
                                       choose_sample_rate_hz, make_board)

pytest_plugins = ["pytester"]

ROOT = Path(__file__).resolve().parent.parent
PROFILES = ROOT / "profiles"
COEFFS = ROOT / "fixtures" / "coeffs"
EXAMPLE = Path(__file__).resolve().parent / "example_firmware"

FS = 48000.0
# A small digital low-pass profile that measures quickly on the simulated station
# (multitone, 6 points per decade). Invented product.
LP_PROFILE = """
schema = 1
[profile]
id = "acme-lp1k"
title = "ACME DSP 1 kHz low-pass, 48 kS/s"
revision = "A"
domain = "digital"
sample_rate_hz = 48000

[[band]]
kind = "pass"
label = "audio"
start_hz = 20.0
stop_hz = 500.0
min_db = -0.5
max_db = 0.5

[[band]]
kind = "stop"
label = "alias"
start_hz = 4000.0
stop_hz = 8000.0
max_db = -40.0

[stimulus]
method = "multitone"
points_per_decade = 6
level_dbfs = -12.0

[decision]
rule = "guarded"
confidence = 0.95
"""


def lp_sos(cutoff_hz: float) -> np.ndarray:
    """4th-order Butterworth low-pass at 48 kHz (scipy.signal.butter, bilinear with
    prewarping). At 1 kHz cutoff: -0.017 dB at 500 Hz and -49 dB at 4 kHz (passes the
    profile); at 2 kHz cutoff: about -24.7 dB at 4 kHz (fails the -40 dB stop band)."""
    return signal.butter(4, cutoff_hz, fs=FS, output="sos")


def coeff_json(sos: np.ndarray, ident: str) -> str:
    return json.dumps({"format": "sos", "sample_rate_hz": FS, "id": ident, "sos": np.asarray(sos).tolist()})


def lp_project(pytester, test_body: str, **extra_files):
    files = {"lp.toml": LP_PROFILE, "lp-good.json": coeff_json(lp_sos(1000.0), "acme-lp-good"),
             "lp-bad.json": coeff_json(lp_sos(2000.0), "acme-lp-bad")}
    files.update(extra_files)
    for name, text in files.items():
        (pytester.path / name).write_text(textwrap.dedent(text) if name.endswith(".toml") else text)
    pytester.makepyfile(test_lp=textwrap.dedent(test_body))


MEASURE_TESTS = """
def test_good(compliance, simulated_board):
    compliance.measure("lp.toml", board=simulated_board("lp-good.json")).assert_compliant()

def test_bad(compliance, simulated_board):
    compliance.measure("lp.toml", board=simulated_board("lp-bad.json")).assert_compliant()
"""


# ======================================================================================
# the failure message and the assertion helper, on a hand-made certificate
# ======================================================================================
def hand_certificate(verdict="fail"):
    """A certificate as harness.measure writes it (DESIGN.md contract), values invented."""
    return {
        "verdict": verdict,
        "reasons": ["gain -24.700 dB at 4000 Hz is outside the mask by 15.300 dB (limits -inf .. -40.00 dB)"],
        "profile": {"id": "acme-lp1k", "revision": "A", "title": "ACME DSP 1 kHz low-pass"},
        "unit": {"serial": "SN-0042"},
        "station": {"id": "bench-7", "backend": "audio"},
        "decision": {"rule": "guarded", "confidence": 0.95, "text": "guarded acceptance, guard band w = U"},
        "points": [
            {"frequency_hz": 100.0, "gain_db": -0.62, "U_gain_db": 0.05, "k_gain": 2.0, "limit_low_db": -0.5,
             "limit_high_db": 0.5, "margin_db": -0.12, "verdict": verdict, "outcome": "below"},
            {"frequency_hz": 4000.0, "gain_db": -24.7, "U_gain_db": 0.044, "k_gain": 2.0, "limit_low_db": None,
             "limit_high_db": -40.0, "margin_db": -15.3, "verdict": verdict, "outcome": "above"},
            {"frequency_hz": 8000.0, "gain_db": -50.0, "U_gain_db": 0.06, "k_gain": 2.0, "limit_low_db": None,
             "limit_high_db": -40.0, "margin_db": 10.0, "verdict": "pass", "outcome": "inside"},
        ],
        "bands": [
            {"index": 0, "kind": "pass", "label": "audio", "start_hz": 20.0, "stop_hz": 500.0,
             "worst_margin_db": -0.12, "worst_frequency_hz": 100.0, "worst_gain_db": -0.62, "U_gain_db": 0.05,
             "verdict": verdict},
            {"index": 1, "kind": "stop", "label": "alias", "start_hz": 4000.0, "stop_hz": 8000.0,
             "worst_margin_db": -15.3, "worst_frequency_hz": 4000.0, "worst_gain_db": -24.7, "U_gain_db": 0.044,
             "verdict": verdict},
        ],
        "phase_check": None,
    }


def test_failure_message_reads_like_a_short_certificate(tmp_path):
    r = ComplianceResult.from_certificate(hand_certificate(), json_path=tmp_path / "c.json",
                                          html_path=tmp_path / "c.html", plot_path=tmp_path / "c.png")
    text = r.summary()
    lines = text.splitlines()
    assert lines[0].startswith("FAIL: unit SN-0042 does not meet profile acme-lp1k rev A")
    # the worse band comes first, with its worst point, limit, margin and uncertainty
    i = next(n for n, line in enumerate(lines) if 'band[1] "alias" (stop 4000..8000 Hz): FAIL' in line)
    assert "4000 Hz: measured -24.700 dB, limit <= -40.000 dB, margin -15.300 dB, U = 0.044 dB" in lines[i + 1]
    assert "95 % coverage" in lines[i + 1]
    # a pass band below its floor names the lower limit, not the upper one
    j = next(n for n, line in enumerate(lines) if 'band[0] "audio" (pass 20..500 Hz): FAIL' in line)
    assert "100 Hz: measured -0.620 dB, limit >= -0.500 dB, margin -0.120 dB" in lines[j + 1]
    assert j > i
    assert "guarded acceptance, guard band w = U" in text
    assert "bench-7" in text
    for name in ("c.json", "c.html", "c.png"):
        assert str(tmp_path / name) in text
    assert r.worst_margin_db == -15.3 and r.worst["band"] == 1


def test_assert_compliant_raises_an_assertion_error_with_the_summary():
    r = ComplianceResult.from_certificate(hand_certificate())
    with pytest.raises(AssertionError) as info:
        assert_compliant(r)
    assert isinstance(info.value, ComplianceFailure) and info.value.result is r
    assert str(info.value) == r.summary()
    with pytest.raises(ComplianceFailure):
        r.assert_compliant()
    ok = ComplianceResult.from_certificate(hand_certificate("pass"))
    assert assert_compliant(ok) is ok and ok.exit_code == 0
    unsure = ComplianceResult.from_certificate(hand_certificate("inconclusive"))
    with pytest.raises(ComplianceFailure, match="^INCONCLUSIVE"):
        unsure.assert_compliant()
    assert unsure.assert_compliant(accept=("pass", "inconclusive")) is unsure
    with pytest.raises(ValueError, match="unknown verdict"):
        assert_compliant(ok, accept=("passed",))


def test_junit_properties_of_a_result(tmp_path):
    r = ComplianceResult.from_certificate(hand_certificate(), json_path=tmp_path / "c.json")
    props = dict(r.junit_properties())
    assert props["harness_verdict"] == "fail"
    assert float(props["harness_worst_margin_db"]) == -15.3
    assert float(props["harness_worst_frequency_hz"]) == 4000.0
    assert props["harness_certificate"] == str(tmp_path / "c.json")


# ======================================================================================
# station choice and simulated boards
# ======================================================================================
def test_simulated_station_rate_covers_the_mask():
    # digital profile: its own rate
    assert choose_sample_rate_hz(load_profile(PROFILES / "hum-notch-50.toml")) == 48000.0
    # analog profiles: the smallest usual rate whose 0.45 fs (flat range of the simulated
    # interface, harness.backends.simulated) covers the top of the mask
    for name in ("iec61260-octave-1k-class1.toml", "aaf-48k.toml", "ultrasonic-bp-40k.toml"):
        prof = load_profile(PROFILES / name)
        top = max(prof.mask.f_max_hz, prof.stimulus.stop_hz or 0.0)
        fs = choose_sample_rate_hz(prof)
        covering = [r for r in SIM_RATES_HZ if 0.45 * r >= top]
        assert fs == (covering[0] if covering else max(SIM_RATES_HZ)), name
    # a digital board's coefficients fix the rate; a clash with the profile is an error
    board44 = make_board(sos=signal.butter(2, 1000, fs=44100, output="sos"), sample_rate_hz=44100)
    with pytest.raises(ConfigError, match="44100 Hz but profile kestrel-ki-d2-notch50 is for 48000 Hz"):
        choose_sample_rate_hz(load_profile(PROFILES / "hum-notch-50.toml"), board44)
    assert choose_sample_rate_hz(load_profile(PROFILES / "aaf-48k.toml"), board44) == 44100.0


def test_board_from_coefficient_file_matches_scipy():
    board = make_board(COEFFS / "hum-notch-50-pass.json")
    doc = json.loads((COEFFS / "hum-notch-50-pass.json").read_text())
    f = np.array([10.0, 49.0, 50.0, 51.0, 1000.0])
    want = signal.freqz(doc["b"], doc["a"], worN=f, fs=doc["sample_rate_hz"])[1]
    got = board.response(f, FS)
    assert np.allclose(got, want, rtol=1e-9, atol=1e-9)          # |H| ~ 1 except at the 50 Hz zero
    assert board.id == doc["id"]


def test_board_from_design_dict_and_arrays_matches_scipy():
    analog = make_board({"family": "butter", "order": 4, "cutoff_hz": 1000.0, "domain": "analog"})
    f = np.array([100.0, 1000.0, 3000.0])
    b, a = signal.butter(4, 2 * np.pi * 1000.0, analog=True)
    assert np.allclose(analog.response(f), signal.freqs(b, a, worN=2 * np.pi * f)[1], rtol=1e-9)
    sos = lp_sos(1000.0)
    digital = make_board(sos=sos, sample_rate_hz=FS, id="lp")
    assert np.allclose(digital.response(f, FS), signal.sosfreqz(sos, worN=f, fs=FS)[1], rtol=1e-12)
    # an analog coefficient file becomes an analog board (zeros/poles in rad/s)
    path = COEFFS / "iec61260-octave-1k-class1-pass-analog.json"
    doc = json.loads(path.read_text())
    board = make_board(path)
    assert board.filter.domain == "analog"
    f = np.array([500.0, 1000.0, 2000.0])
    design = load_coefficients(path)
    want = signal.freqs_zpk(design.zeros, design.poles, design.gain, worN=2 * np.pi * f)[1]
    assert np.allclose(board.response(f), want, rtol=1e-9)
    assert doc["domain"] == "analog"
    with pytest.raises(ConfigError, match="give either a source or coefficients"):
        make_board(COEFFS / "hum-notch-50-pass.json", sos=sos)


def test_board_quantized_to_fixed_point():
    # Q2.14: 2 integer bits (with the sign), coefficients rounded to the nearest 2^-14
    doc = json.loads((COEFFS / "hum-notch-50-pass.json").read_text())
    board = make_board(COEFFS / "hum-notch-50-pass.json", quantize="Q2.14")
    want = np.round(np.concatenate([doc["b"], doc["a"]]) * 2 ** 14) / 2 ** 14
    assert np.array_equal(np.array(board.filter.sos)[0], want)
    assert board.id == doc["id"] + "-Q2.14"
    sos = lp_sos(1000.0)
    # scipy's low-pass sections carry b = [1, 2, 1] after the first: 2 is outside Q2.14's
    # range [-2, 2 - 2^-14], which must be an error, never a silent saturation
    assert np.max(sos[:, :3]) == 2.0
    with pytest.raises(ConfigError, match="Q2.14 cannot hold section 1 coefficient b1 = 2"):
        make_board(sos=sos, sample_rate_hz=FS, quantize="Q2.14")


def test_board_imperfections_are_validated_and_merged():
    dev = make_board(ROOT / "fixtures" / "dut-notch50-nominal.toml", imperfections={"gain_error_db": 0.2})
    assert dev.imperfections.gain_error_db == 0.2
    assert dev.imperfections.latency_samples == 12.37          # kept from the file
    with pytest.raises(ConfigError) as info:
        make_board(COEFFS / "hum-notch-50-pass.json", imperfections={"gain_eror_db": 0.1})
    assert info.value.key == "imperfections.gain_eror_db"
    assert "did you mean 'gain_error_db'" in str(info.value)


# ======================================================================================
# pytester: options, errors, markers
# ======================================================================================
def test_missing_station_file_is_a_usage_error(pytester):
    pytester.makepyfile("def test_x():\n    pass\n")
    res = pytester.runpytest("--harness-station", "no-such-station.toml")
    assert res.ret == pytest.ExitCode.USAGE_ERROR
    err = res.stderr.str()
    assert "--harness-station: no-such-station.toml: file not found" in err
    assert "Traceback" not in err + res.stdout.str()


def test_bad_station_file_names_the_key(pytester):
    pytester.makepyfile("def test_x():\n    pass\n")
    (pytester.path / "st.toml").write_text(textwrap.dedent("""
        [station]
        id = "bench-1"
        backend = "simulted"
        sample_rate_hz = 48000
        max_output_dbfs = -6.0
    """))
    res = pytester.runpytest("--harness-station", "st.toml")
    assert res.ret == pytest.ExitCode.USAGE_ERROR
    assert re.search(r"--harness-station: \S*st\.toml: station\.backend: .*did you mean 'simulated'", res.stderr.str())


def test_bad_profile_is_a_clear_failure_not_a_traceback(pytester):
    bad = LP_PROFILE.replace('stop_hz = 500.0', 'stop_hz = 5.0')
    lp_project(pytester, """
        def test_bad_profile(compliance, simulated_board):
            compliance.measure("broken.toml", board=simulated_board("lp-good.json"))

        def test_missing_profile(compliance):
            compliance.check_design("nowhere.toml", "lp-good.json")

        def test_bad_coefficients(compliance, simulated_board):
            simulated_board("nonsense.json")
    """, **{"broken.toml": bad, "nonsense.json": '{"format": "sos", "sample_rate_hz": 48000, "sos": [[1, 0, 0]]}'})
    res = pytester.runpytest("-p", "no:cacheprovider")
    res.assert_outcomes(failed=3)
    out = res.stdout.str()
    assert re.search(r"harness: bad profile: \S*broken\.toml: band\[0\]\.st\w+_hz: start \(20 Hz\) must be below "
                     r"stop \(5 Hz\)", out)
    assert re.search(r"harness: bad profile: \S*nowhere\.toml: file not found", out)
    assert re.search(r"harness: cannot build the simulated board: \S*nonsense\.json: sos\[0\]: must be a row of 6 numbers", out)
    assert "Traceback" not in out and "raise ConfigError" not in out


def test_markers_skip_with_a_clear_reason(pytester):
    pytester.makepyfile(test_m="""
        import pytest

        @pytest.mark.needs_station
        def test_bench(filter_station):
            assert filter_station.given

        @pytest.mark.simulation_only
        def test_sim(filter_station):
            assert not filter_station.hardware
    """)
    res = pytester.runpytest("-rs")
    res.assert_outcomes(passed=1, skipped=1)
    res.stdout.fnmatch_lines(["*needs a measurement station: run pytest with --harness-station FILE*"])

    def run(*args):
        return pytester.runpytest("--import-mode=importlib", *args)
    (pytester.path / "audio.toml").write_text(textwrap.dedent("""
        [station]
        id = "bench-9"
        backend = "audio"
        sample_rate_hz = 48000
        max_output_dbfs = -6.0
    """))
    res = pytester.runpytest("-rs", "--harness-station", "audio.toml")
    res.assert_outcomes(passed=1, skipped=1)
    res.stdout.fnmatch_lines(["harness: station bench-9 (audio, 48000 Hz)*",
                              "*runs on a simulated board only; --harness-station *audio.toml is real hardware "
                              "(station bench-9, backend audio)*"])
    res = pytester.runpytest("--markers")
    res.stdout.fnmatch_lines(["@pytest.mark.needs_station:*", "@pytest.mark.simulation_only:*"])


def test_real_station_measures_the_bench_unit_not_the_board(pytester):
    # The same test on a bench: the board argument is the simulation stand-in only; the
    # station names the audio backend with no [station.audio] table, so opening the
    # bench unit fails (no audio device is chosen), which must be a clear failure that
    # comes from the audio station, not a measurement of the simulated board.
    lp_project(pytester, MEASURE_TESTS, **{"audio.toml": """
        [station]
        id = "bench-9"
        backend = "audio"
        sample_rate_hz = 48000
        max_output_dbfs = -6.0
    """})
    res = pytester.runpytest("--harness-station", "audio.toml", "-p", "no:cacheprovider")
    res.assert_outcomes(failed=2)
    out = res.stdout.str()
    assert "harness: cannot measure against profile acme-lp1k: " in out
    assert "audio.toml: station.audio" in out
    assert "Traceback" not in out


# ======================================================================================
# pytester: measuring passing and failing filters, JUnit XML
# ======================================================================================
def test_measured_pass_and_fail_with_junit_properties(pytester):
    lp_project(pytester, MEASURE_TESTS)
    res = pytester.runpytest("--junitxml=report.xml", "-p", "no:cacheprovider")
    res.assert_outcomes(passed=1, failed=1)
    out = res.stdout.str()

    # the failure reads like a short certificate
    assert "FAIL: unit acme-lp-bad does not meet profile acme-lp1k rev A" in out
    assert 'failing band band[1] "alias" (stop 4000..8000 Hz): FAIL' in out
    m = re.search(r"worst at +([0-9.]+) Hz: measured ([-+0-9.]+) dB, limit <= -40\.000 dB, margin ([-+0-9.]+) dB, "
                  r"U = ([0-9.]+) dB at 95 % coverage", out)
    assert m, out
    f_hz, gain_db, margin_db, u_db = map(float, m.groups())
    # outside reference: the exact response of the coefficients (scipy.signal.sosfreqz)
    exact_db = 20 * np.log10(abs(signal.sosfreqz(lp_sos(2000.0), worN=[f_hz], fs=FS)[1][0]))
    assert 4000.0 <= f_hz <= 8000.0
    assert abs(gain_db - exact_db) <= max(u_db, 0.01) + 0.002
    assert margin_db == pytest.approx(-40.0 - gain_db, abs=0.002)
    assert "guarded acceptance" in out
    cert_path = Path(re.search(r"certificate  (\S+\.json)", out).group(1))
    plot_path = Path(re.search(r"plot +(\S+\.png)", out).group(1))
    assert cert_path.is_file() and plot_path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert Path(re.search(r"report +(\S+\.html)", out).group(1)).is_file()
    assert str(pytester.path.parent / "basetemp") in str(cert_path)       # pytest's temporary folder
    assert "Traceback" not in out

    # JUnit XML: verdict, worst margin and certificate path of each test
    tree = ET.parse(pytester.path / "report.xml")
    props = {}
    for case in tree.iter("testcase"):
        props[case.get("name")] = {p.get("name"): p.get("value") for p in case.iter("property")}
    for name, verdict in (("test_good", "pass"), ("test_bad", "fail")):
        p = props[name]
        assert p["harness_verdict"] == verdict
        cert = json.loads(Path(p["harness_certificate"]).read_text())
        assert cert["verdict"] == verdict and cert["profile"]["id"] == "acme-lp1k"
        margins = [q["margin_db"] for q in cert["points"] if q["margin_db"] is not None]
        assert float(p["harness_worst_margin_db"]) == pytest.approx(min(margins), rel=1e-5)
        assert p["harness_profile"] == "acme-lp1k rev A"
    assert props["test_bad"]["harness_certificate"] == str(cert_path)
    assert float(props["test_good"]["harness_worst_margin_db"]) > 0 > float(props["test_bad"]["harness_worst_margin_db"])


def test_simulated_station_file_and_needs_station(pytester):
    # --harness-station with a simulated station: tests marked needs_station run and
    # measure the station's own device model; a board passed in replaces it.
    board = make_board(sos=lp_sos(2000.0), sample_rate_hz=FS, id="KD-7-LP2K")
    lp_project(pytester, """
        import pytest

        @pytest.mark.needs_station
        def test_station_unit(compliance, filter_station):
            assert filter_station.given and not filter_station.hardware
            r = compliance.measure("lp.toml")
            assert r.unit == "SN-777" and r.verdict == "fail"
    """, **{"dut.toml": board.to_toml(), "sim.toml": """
        [station]
        id = "sim-bench-1"
        backend = "simulated"
        device_model = "dut.toml"
        sample_rate_hz = 48000
        max_output_dbfs = -6.0
        [station.type_b]
        level_db = 0.02
        flatness_db = 0.01
        phase_deg = 0.1
    """})
    res = pytester.runpytest("--harness-station", "sim.toml", "--harness-serial", "SN-777", "--harness-out", "records",
                             "-p", "no:cacheprovider")
    res.assert_outcomes(passed=1)
    res.stdout.fnmatch_lines(["harness: station sim-bench-1 (simulated, 48000 Hz)*",
                              "*harness compliance results*", "FAIL*SN-777 vs acme-lp1k*"])
    # --harness-out: the records under DIR/<test id>/, named by the serial number
    certs = list((pytester.path / "records").glob("*/SN-777_*.json"))
    assert len(certs) == 1 and certs[0].parent.name.startswith("test_lp.py-test_station_unit")
    assert json.loads(certs[0].read_text())["unit"]["serial"] == "SN-777"


# ======================================================================================
# fixed point
# ======================================================================================
def test_fixed_point_design_check_of_the_hum_notch(pytester):
    """A 50 Hz notch at 48 kHz has its poles 0.0003 from the unit circle: 16-bit Q2.14
    coefficients cannot hold it (rounding puts a pole on the circle), 32-bit Q2.30 can."""
    doc = json.loads((COEFFS / "hum-notch-50-pass.json").read_text())
    a_q14 = np.round(np.array(doc["a"]) * 2 ** 14) / 2 ** 14
    assert np.max(np.abs(np.roots(a_q14))) >= 1.0 - 1e-12                 # numpy: unstable in Q2.14
    a_q30 = np.round(np.array(doc["a"]) * 2 ** 30) / 2 ** 30
    assert np.max(np.abs(np.roots(a_q30))) < 1.0
    shutil.copy(PROFILES / "hum-notch-50.toml", pytester.path / "notch.toml")
    shutil.copy(COEFFS / "hum-notch-50-pass.json", pytester.path / "coeffs.json")
    pytester.makepyfile(test_fx="""
        def test_q30(compliance):
            compliance.check_design("notch.toml", "coeffs.json", quantize="Q2.30").assert_compliant()

        def test_q14(compliance):
            compliance.check_design("notch.toml", "coeffs.json", quantize="Q2.14").assert_compliant()
    """)
    res = pytester.runpytest("-p", "no:cacheprovider")
    res.assert_outcomes(passed=1, failed=1)
    out = res.stdout.str()
    assert "FAIL: design ki-d2-notch50-q10-Q2.14 does not meet profile kestrel-ki-d2-notch50 rev 1.2" in out
    assert "judged with coefficients rounded to Q2.14 (16-bit)" in out and "NOT STABLE" in out
    assert "U = 0 (exact design response)" in out
    m = re.search(r"certificate  (\S+\.json)", out)
    rec = json.loads(Path(m.group(1)).read_text())
    assert rec["kind"] == "design-check" and rec["verdict"] == "fail"
    assert rec["quantization"]["format"] == "Q2.14" and rec["quantization"]["stable"] is False
    sos_q = np.array(rec["quantization"]["sos"])
    assert np.allclose(sos_q[0, 4:], a_q14[1:], atol=0) and np.allclose(sos_q[0, :3] * 2 ** 14,
                                                                        np.round(sos_q[0, :3] * 2 ** 14))


# ======================================================================================
# the example a team copies
# ======================================================================================
@pytest.mark.slow
def test_example_copied_into_an_empty_project_fails_readably_when_broken(pytester):
    """What a new user does with the README example: copy it into an empty project, run
    pytest (passes), run it on a (simulated) bench station, then break the filter and
    see a readable failure."""
    for f in EXAMPLE.iterdir():
        if f.is_file() and f.suffix in (".py", ".toml", ".json"):
            shutil.copy(f, pytester.path / f.name)
    # first in a fresh process, exactly as a new user runs it; then in this process with
    # importlib imports, so that this suite's own copy of test_notch_firmware.py (already
    # imported under that name) does not clash with the project's copy
    res = pytester.runpytest_subprocess("-p", "no:cacheprovider", "-rs")
    outcomes = res.parseoutcomes()
    assert outcomes.get("failed", 0) == 0 and outcomes.get("errors", 0) == 0, res.stdout.str()
    assert outcomes["passed"] >= 3 and outcomes["skipped"] == 1           # needs_station: no station in CI
    res.stdout.fnmatch_lines(["*needs a measurement station: run pytest with --harness-station FILE*"])

    def run(*args):
        return pytester.runpytest("--import-mode=importlib", *args)

    # on a station (here a simulated one standing in for the bench) every test runs
    coeffs = pytester.path / "notch_coeffs.json"
    (pytester.path / "bench").mkdir()
    (pytester.path / "bench" / "module.toml").write_text(make_board(coeffs, quantize="Q2.30").to_toml())
    (pytester.path / "bench" / "station.toml").write_text(textwrap.dedent("""
        [station]
        id = "sim-bench-kd2"
        backend = "simulated"
        device_model = "module.toml"
        sample_rate_hz = 48000
        max_output_dbfs = -6.0
        chain_latency_samples = 300
        [station.type_b]
        level_db = 0.02
        flatness_db = 0.01
        phase_deg = 0.1
    """))
    res = run("-p", "no:cacheprovider", "--harness-station", "bench/station.toml",
                             "--harness-serial", "KD2-00123")
    res.assert_outcomes(passed=outcomes["passed"] + 1)
    res.stdout.fnmatch_lines(["*KD2-00123 vs kestrel-ki-d2-fw-notch50*"])

    # break the filter: a firmware build for 60 Hz mains (scipy.signal.iirnotch(60, 10))
    doc = json.loads(coeffs.read_text())
    b, a = signal.iirnotch(60.0, 10.0, fs=doc["sample_rate_hz"])
    assert doc["format"] == "sos"
    doc["sos"] = [list(b) + list(a)]
    coeffs.write_text(json.dumps(doc, indent=1))
    res = run("-p", "no:cacheprovider")
    assert res.parseoutcomes()["failed"] >= 3
    out = res.stdout.str()
    assert "Traceback" not in out
    assert 'failing band band[1] "mains 50 Hz" (stop 49.8..50.2 Hz): FAIL' in out
    assert 'failing band band[2] "above hum" (pass 60..20000 Hz): FAIL' in out
    # the numbers in the messages against scipy.signal.freqz, relative to 1 kHz (the
    # profile's reference): exact for the design check, within U for the measurement
    for word, tol in (("computed", None), ("measured", "U")):
        m = re.search(rf'band\[1\] "mains 50 Hz".*\n.*worst at +([0-9.]+) Hz: {word} (-[0-9.]+) dB, '
                      rf"limit <= -20\.000 dB, margin (-[0-9.]+) dB, U = ([0-9.]+)", out)
        assert m, (word, out)
        f_hz, gain_db, margin_db, u_db = map(float, m.groups())
        h = signal.freqz(b, a, worN=[f_hz, 1000.0], fs=doc["sample_rate_hz"])[1]
        want_db = 20 * np.log10(abs(h[0]) / abs(h[1]))
        assert 49.8 <= f_hz <= 50.2
        assert abs(gain_db - want_db) <= (0.001 if tol is None else max(u_db, 0.01) + 0.002), (word, gain_db, want_db)
        assert margin_db == pytest.approx(-20.0 - gain_db, abs=0.002)
    assert re.search(r"certificate  \S+\.json", out) and re.search(r"plot +\S+\.png", out)


def test_readme_example_is_the_tested_example():
    """The README's copy-paste example must be exactly these tested files."""
    readme = ROOT / "README.md"
    text = readme.read_text(encoding="utf-8") if readme.exists() else ""
    if "test_notch_firmware.py" not in text:
        pytest.skip("README.md has no pytest example section yet")
    for name in ("notch-profile.toml", "notch_coeffs.json", "test_notch_firmware.py"):
        assert (EXAMPLE / name).read_text(encoding="utf-8").rstrip("\n") in text, name
