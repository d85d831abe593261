"""Smoke test of the benchmarks (tests/benchmarks, run in full by
``python -m tests.benchmarks``): every benchmark runs with minimal counts through the
command line, writes its JSON, and gives figures of the right shape and sane size.

The counts are far too small for results; the checks are the ones that hold even so:
an efficient estimator's variance at SNR 60 dB is its Cramer-Rao bound (Rife &
Boorstyn 1974; Kay 1993) within the scatter of 200 (sine fit) / 15x12 (multitone)
trials; a 95 % interval covers most points; the Student-t coverage factor for finite
dof exceeds the normal 1.96 (JCGM 100 Table G.2); H1 on the steady-state periods with
a rectangular window is algebraically the ratio of averaged spectra (Pintelon &
Schoukens), so our error equals its error to within the few samples the windows differ.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:          # `python -m pytest` has it; the `pytest` script may not
    sys.path.insert(0, str(ROOT))

from tests.benchmarks import MODULES  # noqa: E402
from tests.benchmarks.__main__ import main  # noqa: E402


@pytest.fixture(scope="module")
def smoke(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench") / "smoke.json"
    assert main(["--smoke", "--json", str(out)]) == 0
    return json.loads(out.read_text())


def test_every_benchmark_ran_with_header_and_rows(smoke):
    assert set(smoke["benchmarks"]) == set(MODULES)
    h = smoke["header"]
    for key in ("date_utc", "cpu_count", "numpy", "scipy", "mode"):
        assert h[key] not in (None, "")
    assert h["mode"] == "smoke"
    rows = smoke["rows"]
    assert rows and all({"bench", "case", "measured", "reference", "ratio", "target", "met"} <= set(r) for r in rows)


def test_crb_efficiency_near_one_at_snr_60(smoke):
    res = smoke["benchmarks"]["crb"]["results"]
    for est in ("sine_fit_3", "multitone_digital", "multitone_reference"):
        r = res[est]["60"]
        # CRB (REFERENCES.md): var(A) >= 2 sigma^2/N, var(phi) >= 2 sigma^2/(A^2 N) -> 1/(N SNR)
        assert r["crb_rel_var"] == pytest.approx(1.0 / (r["n_samples"] * 1e6))
        assert 0.5 <= r["eff_amp"] <= 1.5, (est, r["eff_amp"])
        assert 0.5 <= r["eff_phase"] <= 1.5, (est, r["eff_phase"])
    assert res["multitone_digital"]["60"]["failed_trials"] == 0


def test_coverage_figures_are_sane(smoke):
    r = smoke["benchmarks"]["coverage"]["results"]
    assert r["trials_analysed"] == r["trials"] == 12
    assert 0.75 <= r["coverage_gain"] <= 1.0
    assert 0.75 <= r["coverage_phase"] <= 1.0
    # finite dof: Student-t k above the normal 1.960 (JCGM 100 Table G.2), below k(nu=1) = 12.71
    assert 1.96 < r["mean_k_gain"] < 12.71 and 1.96 < r["mean_k_phase"] < 12.71
    assert r["mean_nu_eff_gain"] >= 1 and r["mean_nu_eff_phase"] >= 1
    # drift-test false alarms: F(2, m) survival has the closed form (1 + 2x/m)^(-m/2),
    # here x = 16, m = 2 (P - 2) with P = 8 measured periods
    assert r["drift_false_alarm_expected"] == pytest.approx((1 + 2 * 16 / 12) ** -6, rel=1e-9)
    assert 0 <= r["drift_false_alarm_rate"] <= 0.05


def test_duration_search_reports_settings_that_met_the_target(smoke):
    r = smoke["benchmarks"]["duration"]["results"]
    lev = r["levels"]["-60"]
    mt, ss = lev["multitone"], lev["stepped_sine"]
    assert mt["points"] == ss["points"] == r["grid_points"] == 37     # 12/decade, 20 Hz..20 kHz
    # a multitone plays 1 transient + P measured periods
    assert mt["duration_s"] == pytest.approx((mt["periods"] + 1) * mt["period_samples"] / 48000.0)
    assert ss["duration_s"] > 0
    for runs in lev["runs"].values():
        for v in runs.values():
            assert v["ok"] == all(u <= 0.05 for u in v["max_U_db"])


def test_h1_on_steady_state_matches_ratio_of_averaged_spectra(smoke):
    rms = smoke["benchmarks"]["h1"]["results"]["-60"]["rms"]
    for q in ("gain_db", "phase_deg"):
        assert rms["ours"][q] > 0
        assert rms["ours"][q] == pytest.approx(rms["h1_boxcar"][q], rel=0.1)


def test_speed_figures_are_sane(smoke):
    r = smoke["benchmarks"]["speed"]["results"]
    assert r["capture_duration_s"] > 2.9 and r["channels"] == 2
    # times depend on the machine's load: only their presence is checked here
    assert r["estimate_best_s"] > 0 and r["analyze_best_s"] > 0
    assert r["estimate_fraction"] == pytest.approx(r["estimate_best_s"] / r["capture_duration_s"])
    assert r["estimate_peak_mb"] >= r["capture_mb"] / 2      # at least the spectra of one channel
    shares = [s["share"] for s in r["estimate_stages"]]
    assert shares and all(0 <= s <= 1.0 for s in shares) and sum(shares) <= 1.05


def test_store_figures_are_sane(smoke):
    r = smoke["benchmarks"]["store"]["results"]
    sq = r["throughput"]["SQLite (WAL, synchronous=FULL)"]
    assert sq["units"] == 10 and sq["points_per_unit"] == 100
    assert sq["units_per_s"] == pytest.approx(sq["units"] / sq["seconds"]) and sq["units_per_s"] > 0
    assert 0 < sq["median_unit_s"] <= sq["p95_unit_s"]
    st = r["stats"]["SQLite"]
    assert st["units"] == 300 and st["attempts"] >= 300 and st["points"] == 26 * st["attempts"]
    assert st["tables_s"] > 0 and st["lowest_cpk"] is not None
