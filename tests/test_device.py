"""Device model files: validation messages, every fixture, writing back, production lots."""

import dataclasses
import re
import textwrap
import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

from harness.backends.simulated import SimulatedBoard
from harness.device import (
    DEFAULT_SPREAD,
    generate_lot,
    load_device_model,
    parse_device_model,
)
from harness.errors import ConfigError

FIX = Path(__file__).resolve().parent.parent / "fixtures"
FIXTURES = sorted(FIX.glob("dut-*.toml"))
FS = 48000.0

GOOD = """
[device]
id = "T-1"
[device.filter]
design = { family = "butter", order = 4, cutoff_hz = 1000.0, btype = "lowpass", domain = "analog" }
"""


def write(tmp_path, text, name="dut.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text))
    return p


def bad(tmp_path, text):
    """Load `text` expecting a ConfigError; returns it after checking it names the file."""
    p = write(tmp_path, text)
    with pytest.raises(ConfigError) as e:
        load_device_model(p)
    assert e.value.file == str(p)
    assert str(p) in str(e.value)
    return e.value


def filt(design: str) -> str:
    return f'[device]\nid = "T"\n[device.filter]\n{design}\n'


# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("path", FIXTURES, ids=[p.name for p in FIXTURES])
def test_every_fixture_loads_and_writes_back(path, tmp_path):
    m = load_device_model(path)
    assert m.id and m.source == str(path)
    text = m.to_toml(header="written back by a test")
    again = parse_device_model(tomllib.loads(text), file="again.toml")
    assert again == m
    assert again.to_dict() == m.to_dict()


def test_fixture_range_covers_the_product_range():
    names = {p.name for p in FIXTURES}
    for need in ("dut-aaf-nominal.toml", "dut-aaf-clipping.toml", "dut-aaf-dead.toml",
                 "dut-aaf-open.toml", "dut-aaf-short.toml", "dut-notch50-nominal.toml",
                 "dut-xover-hp-nominal.toml", "dut-us40k-nominal.toml"):
        assert need in names
    notch = load_device_model(FIX / "dut-notch50-nominal.toml")
    assert notch.filter.domain == "digital" and notch.filter.design.family == "iirnotch"
    us = load_device_model(FIX / "dut-us40k-nominal.toml")
    assert "192 kHz" in (FIX / "dut-us40k-nominal.toml").read_text()
    assert us.filter.design.cutoff_hz == (36000.0, 44000.0)


def test_zpk_fixture_is_a_second_order_butterworth():
    # Sallen-Key with Q = 1/sqrt(2) is the 2nd-order Butterworth (textbook); compare with
    # scipy.signal.butter(2, 2 pi 1000, analog=True) and its -3.0103 dB at the cutoff.
    m = load_device_model(FIX / "dut-sk1k-zpk.toml")
    f = np.geomspace(10, 20000, 200)
    b, a = signal.butter(2, 2 * np.pi * 1000, analog=True)
    np.testing.assert_allclose(m.response(f), signal.freqs(b, a, 2 * np.pi * f)[1], rtol=1e-9)
    assert 20 * np.log10(abs(m.response([1000.0])[0])) == pytest.approx(-3.0103, abs=1e-4)


def test_sos_fixture_is_scipy_butter():
    m = load_device_model(FIX / "dut-dsp8k-sos.toml")
    np.testing.assert_allclose(m.filter.digital_sos(FS),
                               signal.butter(4, 8000, fs=FS, output="sos"), rtol=1e-12)


def test_analog_forms_agree(tmp_path):
    # one 3rd-order Chebyshev I (1 dB) written as design, zpk and ba gives one response
    z, p, k = signal.cheby1(3, 1.0, 2 * np.pi * 5000, analog=True, output="zpk")
    b, a = signal.cheby1(3, 1.0, 2 * np.pi * 5000, analog=True)
    pairs = lambda r: "[" + ", ".join(f"[{float(v.real)!r}, {float(v.imag)!r}]" for v in r) + "]"
    d1 = load_device_model(write(tmp_path, filt(
        'design = { family = "cheby1", order = 3, rp_db = 1.0, cutoff_hz = 5000.0, domain = "analog" }'), "a.toml"))
    d2 = load_device_model(write(tmp_path, filt(
        f'zpk = {{ z = [], p = {pairs(p)}, k = {float(k)!r}, domain = "analog" }}'), "b.toml"))
    d3 = load_device_model(write(tmp_path, filt(
        f'ba = {{ b = {list(map(float, b))!r}, a = {list(map(float, a))!r}, domain = "analog" }}'), "c.toml"))
    f = np.geomspace(100, 40000, 100)
    ref = signal.freqs(b, a, 2 * np.pi * f)[1]
    for m in (d1, d2, d3):
        np.testing.assert_allclose(m.response(f), ref, rtol=1e-7)
    # Chebyshev I: the gain at the cutoff is -rp (scipy.signal.cheby1 docs)
    assert 20 * np.log10(abs(d1.response([5000.0])[0])) == pytest.approx(-1.0, abs=1e-6)


def test_digital_design_defaults_to_the_station_rate(tmp_path):
    m = load_device_model(write(tmp_path, filt(
        'design = { family = "butter", order = 2, cutoff_hz = 1000.0, domain = "digital" }')))
    assert m.filter.sample_rate_hz is None
    for fs in (44100.0, 48000.0):
        np.testing.assert_allclose(m.filter.digital_sos(fs), signal.butter(2, 1000.0, fs=fs, output="sos"))
    with pytest.raises(ConfigError) as e:
        m.filter.digital_sos(1500.0, file="x.toml")
    assert e.value.key == "device.filter.design.cutoff_hz"


def test_imperfections_read(tmp_path):
    m = load_device_model(FIX / "dut-aaf-imperfect.toml")
    imp = m.imperfections
    assert imp.latency_samples == 12.37 and imp.clock_offset_ppm == 40.0 and imp.hum_dbfs == -70.0
    assert load_device_model(write(tmp_path, GOOD)).imperfections.fault == "none"


# --------------------------------------------------------------------------------------
# bad files: each names the file, the key path and the problem
BAD_CASES = [
    # (text, key, words the message must contain)
    (GOOD.replace("[device.filter]", "[device.imperfections]\ngain_eror_db = 1.0\n[device.filter]"),
     "device.imperfections.gain_eror_db", ["unknown key", "did you mean 'gain_error_db'"]),
    (GOOD.replace("order = 4", 'order = "six"'), "device.filter.design.order", ["whole number", "string"]),
    (GOOD.replace("order = 4", "order = -2"), "device.filter.design.order", ["at least 1", "-2"]),
    (GOOD.replace('"butter"', '"buter"'), "device.filter.design.family", ["unknown value", "did you mean 'butter'"]),
    ('[device]\nid = "T"\n', "device.filter", ["missing table"]),
    ('[device]\nid = "T"\n[device.filter]\n', "device.filter", ["give exactly one of design, sos, zpk, ba"]),
    (GOOD + 'zpk = { z = [], p = [-1.0], k = 1.0, domain = "analog" }\n', "device.filter.zpk",
     ["two filter forms", "design", "zpk"]),
    (GOOD.replace('id = "T-1"', ""), "device.id", ["missing key"]),
    (GOOD.replace("[device]", "[devise]"), "devise", ["did you mean 'device'"]),
    (GOOD.replace('domain = "analog"', 'domain = "analogue"'), "device.filter.design.domain", ["did you mean 'analog'"]),
    (GOOD.replace(', domain = "analog"', ""), "device.filter.design.domain", ["missing key"]),
    (GOOD.replace("cutoff_hz = 1000.0", "cutoff_hz = -5.0"), "device.filter.design.cutoff_hz", ["greater than 0"]),
    (GOOD.replace("cutoff_hz = 1000.0", "cutoff_hz = [1000.0, 500.0]"), "device.filter.design.cutoff_hz", ["below"]),
    (GOOD.replace("cutoff_hz = 1000.0", "cutoff_hz = [500.0, 1000.0]"), "device.filter.design.cutoff_hz",
     ["bandpass", "bandstop"]),
    (GOOD.replace('btype = "lowpass"', 'btype = "bandpass"'), "device.filter.design.cutoff_hz", ["[low, high]"]),
    (GOOD.replace('"butter"', '"cheby1"'), "device.filter.design.rp_db", ["missing key"]),
    (GOOD.replace("order = 4", "order = 4, rp_db = 1.0"), "device.filter.design.rp_db", ["not used by butter"]),
    (GOOD.replace('"butter", order = 4', '"linkwitz_riley", order = 3'), "device.filter.design.order", ["even"]),
    (GOOD.replace("order = 4", "order = 40"), "device.filter.design.order", ["at most 20"]),
    (filt('design = { family = "iirnotch", cutoff_hz = 50.0, q = 30.0, domain = "analog" }'),
     "device.filter.design.domain", ["digital"]),
    (filt('design = { family = "iirnotch", order = 2, cutoff_hz = 50.0, q = 30.0 }'),
     "device.filter.design.order", ["not used by iirnotch"]),
    (filt('design = { family = "iirnotch", cutoff_hz = 50.0 }'), "device.filter.design.q", ["missing key"]),
    (filt('design = { family = "butter", order = 2, cutoff_hz = 30000.0, domain = "digital", sample_rate_hz = 48000.0 }'),
     "device.filter.design.cutoff_hz", ["half the sample rate"]),
    (GOOD.replace("order = 4", "order = 4, sample_rate_hz = 48000.0"), "device.filter.design.sample_rate_hz",
     ["analog filter has no sample rate"]),
    (filt("sos = [[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]]"), "device.filter.sample_rate_hz", ["missing key"]),
    (filt("sos = [[1.0, 0.0, 0.0, 1.0, 0.0]]\nsample_rate_hz = 48000.0"), "device.filter.sos[0]", ["6 numbers"]),
    (filt("sos = [[1.0, 0.0, 0.0, 1.0, -2.5, 1.2]]\nsample_rate_hz = 48000.0"), "device.filter.sos", ["unstable"]),
    (filt('sos = [[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]]\nsample_rate_hz = "fast"'), "device.filter.sample_rate_hz",
     ["must be a number"]),
    (filt('zpk = { z = [], p = [[-1.0, 2.0]], k = 1.0, domain = "analog" }'), "device.filter.zpk.p",
     ["conjugate pairs"]),
    (filt('zpk = { z = [], p = [[-1.0, 2.0, 3.0]], k = 1.0, domain = "analog" }'), "device.filter.zpk.p[0]",
     ["[re, im]"]),
    (filt('zpk = { z = [], p = [1.0], k = 1.0, domain = "analog" }'), "device.filter.zpk.p", ["left half-plane"]),
    (filt('zpk = { z = [-1.0, -2.0], p = [-1.0], k = 1.0, domain = "analog" }'), "device.filter.zpk.z",
     ["at most as many zeros as poles"]),
    (filt('zpk = { z = [], p = [0.5], k = 1.0, domain = "digital" }'), "device.filter.zpk.sample_rate_hz",
     ["missing key"]),
    (filt('ba = { b = [1.0], a = [1.0, -1.5], domain = "digital", sample_rate_hz = 48000.0 }'),
     "device.filter.ba.a", ["unit circle"]),
    (filt('ba = { b = [1.0, 0.0, 0.0], a = [1.0, 1.0], domain = "analog" }'), "device.filter.ba.b",
     ["proper"]),
    (GOOD + "[device.imperfections]\ndropout_samples = 100\n", "device.imperfections.dropout_at_s",
     ["missing key"]),
    (GOOD + '[device.imperfections]\nfault = "broken"\n', "device.imperfections.fault", ["none, open, short, dead"]),
    (GOOD + "[device.imperfections]\nlatency_samples = -1.0\n", "device.imperfections.latency_samples",
     ["at least 0"]),
    (GOOD + "[device.imperfections]\noutput_noise_dbfs = 6.0\n", "device.imperfections.output_noise_dbfs",
     ["at most 0"]),
    (GOOD + "[device.imperfections]\nclip_level = 0.0\n", "device.imperfections.clip_level", ["greater than 0"]),
    (GOOD + "[device.imperfections]\nseed = 1.5\n", "device.imperfections.seed", ["whole number"]),
]


@pytest.mark.parametrize("text,key,words", BAD_CASES, ids=[c[1] + "-" + str(i) for i, c in enumerate(BAD_CASES)])
def test_bad_file_names_file_key_and_problem(tmp_path, text, key, words):
    err = bad(tmp_path, text)
    assert err.key == key
    for w in words:
        assert w in err.problem, (w, err.problem)


def test_syntax_error_and_missing_file(tmp_path):
    err = bad(tmp_path, "[device\nid = 1\n")
    assert "TOML syntax error" in err.problem
    with pytest.raises(ConfigError) as e:
        load_device_model(tmp_path / "nope.toml")
    assert "file not found" in str(e.value)


def test_ellip_needs_rs_above_rp(tmp_path):
    err = bad(tmp_path, filt('design = { family = "ellip", order = 4, rp_db = 1.0, rs_db = 0.5, '
                             'cutoff_hz = 1000.0, domain = "analog" }'))
    assert err.key == "device.filter.design.rs_db"


# --------------------------------------------------------------------------------------
# production lots
def nominal():
    return load_device_model(FIX / "dut-aaf-nominal.toml")


def test_lot_is_deterministic_and_serialised():
    a = generate_lot(nominal(), 12, seed=7, serial_prefix="KA200-2612")
    b = generate_lot(nominal(), 12, seed=7, serial_prefix="KA200-2612")
    c = generate_lot(nominal(), 12, seed=8, serial_prefix="KA200-2612")
    assert [s for s, _ in a] == [f"KA200-2612-{i:04d}" for i in range(1, 13)]
    assert [m.to_dict() for _, m in a] == [m.to_dict() for _, m in b]
    assert [m.to_dict() for _, m in a] != [m.to_dict() for _, m in c]
    assert all(m.id == s for s, m in a)
    assert len({m.imperfections.seed for _, m in a}) == 12       # each unit its own noise
    # default prefix: model letters and the lot seed
    assert generate_lot(nominal(), 1, seed=3)[0][0] == "KA200-0003-0001"


def test_lot_spread_matches_the_documented_model():
    lot = generate_lot(nominal(), 300, seed=1, out_of_tolerance=0)
    ratio = np.array([m.filter.design.cutoff_hz / 18000.0 - 1 for _, m in lot])
    gain = np.array([m.imperfections.gain_error_db - 0.02 for _, m in lot])
    # sample sd of 300 normal draws is within +-20 % of sigma with overwhelming
    # probability (chi distribution, sd ~ sigma / sqrt(2 * 300) = 4 %)
    assert np.std(ratio) == pytest.approx(DEFAULT_SPREAD["cutoff_pct"] / 100, rel=0.2)
    assert np.std(gain) == pytest.approx(DEFAULT_SPREAD["gain_db"], rel=0.2)
    assert abs(np.mean(ratio)) < 4 * 0.01 / np.sqrt(300)
    assert all(m.note.startswith("lot unit") for _, m in lot)


def test_lot_has_some_units_out_of_a_nominal_tolerance_and_most_inside():
    # tolerance: within +-0.5 dB of the nominal board's true response from 100 Hz to 16 kHz
    n = 30
    lot = generate_lot(nominal(), n, seed=2612, out_of_tolerance=0.1)
    f = np.geomspace(100, 16000, 40)
    ref = 20 * np.log10(np.abs(SimulatedBoard(nominal(), FS, analog_oversample=32).true_response(f)))
    outside = []
    for serial, m in lot:
        h = SimulatedBoard(m, FS, analog_oversample=32).true_response(f)
        dev = np.max(np.abs(20 * np.log10(np.abs(h)) - ref))
        if dev > 0.5:
            outside.append(serial)
        assert (dev > 0.5) == m.note.startswith("deliberately"), (serial, dev, m.note)
    assert len(outside) == round(0.1 * n)
    assert n - len(outside) >= 0.8 * n
    # the count form
    assert sum(m.note.startswith("deliberately") for _, m in generate_lot(nominal(), 10, out_of_tolerance=4)) == 4


def test_lot_units_write_and_read_back(tmp_path):
    for serial, m in generate_lot(load_device_model(FIX / "dut-us40k-nominal.toml"), 3, seed=4):
        p = tmp_path / f"{serial}.toml"
        p.write_text(m.to_toml(header=f"unit {serial}"))
        again = load_device_model(p)
        assert again == m
        f = np.array([36000.0, 40000.0, 44000.0])
        np.testing.assert_allclose(again.response(f), m.response(f))


def test_lot_of_a_digital_board_keeps_its_coefficients():
    nom = load_device_model(FIX / "dut-notch50-nominal.toml")
    lot = generate_lot(nom, 8, seed=5, out_of_tolerance=2)
    for _, m in lot:
        assert m.filter == nom.filter          # DSP coefficients are exact
    bad_units = [m for _, m in lot if m.note.startswith("deliberately")]
    assert len(bad_units) == 2 and all("gain error" in m.note for m in bad_units)
    assert all(abs(m.imperfections.gain_error_db) > 1.0 for m in bad_units)


def test_lot_scales_coefficient_forms():
    # an analog zpk unit with its frequency scaled by a keeps its shape: H_a(f) = H(f / a)
    nom = load_device_model(FIX / "dut-sk1k-zpk.toml")
    (_, unit), = generate_lot(nom, 1, seed=11, out_of_tolerance=0)
    a = abs(unit.filter.p[0]) / abs(nom.filter.p[0])
    assert a != 1.0
    f = np.geomspace(50, 20000, 50)
    np.testing.assert_allclose(unit.response(f), nom.response(f / a), rtol=1e-9)


def test_lot_bad_arguments():
    with pytest.raises(ConfigError) as e:
        generate_lot(nominal(), 5, spread={"cutof_pct": 2.0})
    assert e.value.key == "spread.cutof_pct" and "cutoff_pct" in e.value.problem
    with pytest.raises(ConfigError):
        generate_lot(nominal(), 0)
    with pytest.raises(ConfigError):
        generate_lot(nominal(), 5, out_of_tolerance=1.5)
    with pytest.raises(ConfigError):
        generate_lot(nominal(), 5, out_of_tolerance=6)
    with pytest.raises(ConfigError):
        generate_lot(nominal(), 5, spread={"gain_db": -1})


def test_to_toml_is_short_and_valid():
    m = dataclasses.replace(nominal(), note='a "quoted" note')
    text = m.to_toml()
    data = tomllib.loads(text)
    assert data["device"]["note"] == 'a "quoted" note'
    assert "imperfections" in data["device"]
    assert "fault" not in data["device"]["imperfections"]       # defaults left out
    assert re.search(r"^design = \{", text, re.M)
