"""KI-D2 firmware: the 50 Hz hum notch meets its profile (an invented team's tests).

The firmware build exports the notch coefficients to notch_coeffs.json; the product
profile is notch-profile.toml. The checks:

* the design (exact response of the coefficients, no hardware);
* the coefficients as the DSP stores them (32-bit Q2.30 fixed point);
* the module measured: in CI a simulated board built from the fixed-point coefficients
  on the built-in simulated station; on the bench the real module, with
  ``pytest --harness-station bench.toml --harness-serial KD2-00123``.

Certificates and plots land in pytest's temporary folder (the failure message shows
where); ``--harness-out DIR`` keeps them elsewhere.
"""

import pytest

from harness.pytest_plugin import assert_compliant

PROFILE = "notch-profile.toml"     # relative paths are looked up beside this file
COEFFS = "notch_coeffs.json"       # exported by the firmware build
DSP_FORMAT = "Q2.30"               # the DSP's biquad coefficients: 32-bit words, 30 fractional bits


def test_design_meets_profile(compliance):
    assert_compliant(compliance.check_design(PROFILE, COEFFS))


def test_fixed_point_coefficients_meet_profile(compliance):
    assert_compliant(compliance.check_design(PROFILE, COEFFS, quantize=DSP_FORMAT))


def test_module_meets_profile(compliance, simulated_board):
    # In CI: a simulated module running the fixed-point coefficients.
    # With --harness-station: the module on the bench (the board here is not used).
    board = simulated_board(COEFFS, quantize=DSP_FORMAT, model="KI-D2", firmware="3.2.0")
    assert_compliant(compliance.measure(PROFILE, board=board))


@pytest.mark.simulation_only
def test_module_meets_profile_with_converter_imperfections(compliance, simulated_board):
    # What the converters around the DSP add: a gain error (cancels against the 1 kHz
    # reference), output noise and a fractional-sample latency.
    board = simulated_board(COEFFS, quantize=DSP_FORMAT, imperfections={
        "gain_error_db": 0.1, "output_noise_dbfs": -100.0, "latency_samples": 23.5})
    assert_compliant(compliance.measure(PROFILE, board=board))


@pytest.mark.needs_station
def test_bench_measurements_repeat_within_uncertainty(compliance):
    # Bench only: two measurements of the same module agree within their combined
    # expanded uncertainty at every frequency (|E_n| <= 1).
    first, second = compliance.measure(PROFILE), compliance.measure(PROFILE)
    for r in (first, second):
        assert r.verdict != "invalid", r.summary()
    for p, q in zip(first.certificate["points"], second.certificate["points"]):
        u = (p["U_gain_db"] ** 2 + q["U_gain_db"] ** 2) ** 0.5
        assert abs(p["gain_db"] - q["gain_db"]) <= u, f"{p['frequency_hz']:g} Hz does not repeat"
