"""Line statistics (harness.stats, `harness stats`) on synthetic stores.

Outside references, each named where it is used:
* NIST/SEMATECH e-Handbook of Statistical Methods, section 6.1.6 (process capability
  example: USL 20, LSL 8, mean 16, sigma 2 -> Cp 1.0, Cpk 0.667; from memory);
* the range of two independent normal values: E[R] = 2 sigma / sqrt(pi) (d2 = 1.128) and
  Var[R] = (2 - 4/pi) sigma^2 (d3 = 0.853), hence E2 = 3/d2 = 2.660 and
  D4 = 1 + 3 d3/d2 = 3.267 (Montgomery, Introduction to Statistical Quality Control,
  Appendix VI factors for n = 2; from memory, and derived here in closed form);
* the Wilson score interval, closed form (Wilson 1927; Agresti & Coull 1998);
* numpy mean / std(ddof=1) for the summary figures; xml.etree and csv to read exports.
"""

from __future__ import annotations

import csv
import io
import json
import math
import uuid
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from harness import stats
from harness import store as st
from harness.cli import main

FREQS = (1000.0, 8000.0)
LIMITS = {1000.0: (-0.3, 0.3), 8000.0: (None, -2.0)}     # a window, and a ceiling only


def record(s, serial, verdict, gains, *, t, attempt_no=1, lot="L1", station="st-1", profile="prof"):
    pts = []
    for i, (f, g) in enumerate(zip(FREQS, gains)):
        lo, hi = LIMITS[f]
        pts.append({"idx": i, "frequency_hz": f, "gain_db": g, "limit_low_db": lo, "limit_high_db": hi,
                    "expanded_gain_db": 0.02})
    row = {"uuid": str(uuid.uuid4()), "serial": serial, "attempt_no": attempt_no, "lot": lot, "operator": "op",
           "station_id": station, "profile_id": profile, "profile_revision": "A", "verdict": verdict,
           "exit_code": 0, "reasons": json.dumps([f"{verdict} reason"]), "worst_margin_db": 0.1,
           "worst_frequency_hz": 1000.0, "n_points": len(pts) if verdict != "abandoned" else 0,
           "certificate_file": f"/records/{serial}-{attempt_no}.json", "started_utc": t, "finished_utc": t}
    s.record_attempt(st.Attempt(row, pts if verdict != "abandoned" else []))


def ts(day: int, second: int) -> str:
    return f"2026-03-{day:02d}T08:{second // 60:02d}:{second % 60:02d}.000000Z"


@pytest.fixture
def line_store(tmp_path):
    """Ten units in two lots over two days, with retests, an invalid first attempt and
    an abandoned attempt. Returns (path, expected per-unit verdict sequences)."""
    path = tmp_path / "line" / "harness-results.sqlite"
    seqs = {
        "U01": ["pass"], "U02": ["fail", "pass"], "U03": ["invalid", "pass"], "U04": ["fail", "fail"],
        "U05": ["pass"], "U06": ["inconclusive", "pass"], "U07": ["abandoned", "pass"], "U08": ["pass"],
        "U09": ["invalid", "invalid"], "U10": ["pass"],
    }
    rng = np.random.default_rng(5)
    sec = 0
    with st.open_store(path) as s:
        for k, (serial, seq) in enumerate(seqs.items()):
            lot = "L1" if k < 6 else "L2"
            day = 1 if k < 5 else 2
            for n, v in enumerate(seq, 1):
                sec += 7
                record(s, serial, v, [float(rng.normal(0.05, 0.08)), float(rng.normal(-3.0, 0.2))],
                       t=ts(day, sec), attempt_no=n, lot=lot, station="st-1" if k % 2 else "st-2")
    return path, seqs


# --------------------------------------------------------------------------------------
# formulas
# --------------------------------------------------------------------------------------
def test_cpk_of_the_nist_handbook_example():
    # NIST/SEMATECH e-Handbook 6.1.6 (from memory): USL 20, LSL 8, mean 16, sigma 2
    assert stats.cpk(16.0, 2.0, 8.0, 20.0) == pytest.approx(4.0 / 6.0)
    assert stats.cpk(16.0, 2.0, None, 20.0) == pytest.approx(4.0 / 6.0)     # Cpu alone
    assert stats.cpk(16.0, 2.0, 8.0, None) == pytest.approx(8.0 / 6.0)      # Cpl alone
    assert math.isnan(stats.cpk(16.0, 2.0, None, None)) and math.isnan(stats.cpk(16.0, 0.0, 8.0, 20.0))


def test_moving_range_constants_for_ranges_of_two():
    d2 = 2.0 / math.sqrt(math.pi)                 # E[|X1 - X2|] / sigma, X ~ N(0, sigma^2)
    d3 = math.sqrt(2.0 - 4.0 / math.pi)           # sd(|X1 - X2|) / sigma
    assert stats.D2_N2 == pytest.approx(1.128, abs=5e-4)          # Montgomery Appendix VI: 1.128
    assert 3.0 / stats.D2_N2 == pytest.approx(2.660, abs=2e-3)    # E2 = 2.660 (3/1.128, rounded)
    assert stats.D4_N2 == pytest.approx(1.0 + 3.0 * d3 / d2, abs=1e-3)   # D4 = 3.267
    x = np.random.default_rng(11).normal(0.0, 1.0, (200000, 2))
    assert np.mean(np.abs(x[:, 0] - x[:, 1])) == pytest.approx(d2, rel=0.01)


def test_sigma_within_estimates_the_process_sigma_and_ignores_a_slow_drift():
    rng = np.random.default_rng(3)
    x = rng.normal(0.0, 0.2, 20000)
    assert stats.sigma_within(x) == pytest.approx(0.2, rel=0.02)
    drift = x + np.linspace(0.0, 5.0, x.size)              # a slow trend inflates s, not MR-bar
    assert np.std(drift, ddof=1) > 1.0
    assert stats.sigma_within(drift) == pytest.approx(0.2, rel=0.03)


def test_wilson_interval_matches_the_closed_form():
    z = 1.959963984540054                                   # normal 97.5 % quantile
    for k, n in ((47, 50), (0, 20), (20, 20), (9, 13)):
        p = k / n
        centre = (p + z * z / (2 * n)) / (1 + z * z / n)
        half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
        lo, hi = stats.wilson_interval(k, n)
        assert lo == pytest.approx(max(centre - half, 0.0), abs=1e-9)
        assert hi == pytest.approx(min(centre + half, 1.0), abs=1e-9)


def test_control_chart_limits_and_signals():
    rng = np.random.default_rng(21)
    base = rng.normal(0.0, 0.1, 30)
    shifted = rng.normal(0.25, 0.1, 30)                    # a 2.5-sigma step after the baseline
    x = np.concatenate([base, shifted])
    cc = stats.control_chart(x, baseline=30)
    mr_bar = np.mean(np.abs(np.diff(base)))
    assert cc.centre == pytest.approx(np.mean(base))
    assert cc.ucl == pytest.approx(np.mean(base) + 2.660 * mr_bar, rel=1e-3)   # x-bar + E2 MR-bar
    assert cc.lcl == pytest.approx(np.mean(base) - 2.660 * mr_bar, rel=1e-3)
    assert cc.mr_ucl == pytest.approx(3.267 * mr_bar, rel=1e-3)
    assert cc.runs and 30 <= cc.runs[0] <= 30 + 14         # the run rule sees the step
    quiet = stats.control_chart(rng.normal(0.0, 0.1, 300), baseline=50)
    # in control: 0.27 % of points beyond 3 sigma expected (0.8 of 300); a run of 8 starts
    # with probability 2 * 0.5**8 at each point (about 2 of 300)
    assert len(quiet.beyond) <= 3 and len(quiet.runs) <= 5
    # an outlier inside the baseline is set aside (Phase I), so it does not widen the limits
    spiky = base.copy()
    spiky[5] = 2.0
    cc2 = stats.control_chart(spiky, baseline=30)
    assert 5 in cc2.beyond and cc2.ucl < 0.5


# --------------------------------------------------------------------------------------
# from a store
# --------------------------------------------------------------------------------------
def test_yield_and_first_pass_yield_by_lot_station_and_day(line_store):
    path, seqs = line_store
    with st.open_store(path, readonly=True) as s:
        rep = stats.compute(s, by="lot")
    judged = {u: [v for v in seq if v != "abandoned"] for u, seq in seqs.items()}
    n = len(judged)
    fp = sum(v[0] == "pass" for v in judged.values())
    fin = sum(v[-1] == "pass" for v in judged.values())
    overall = stats.yield_table(rep.units, None)[0]
    assert (overall["units"], overall["first_pass"], overall["passed"]) == (n, fp, fin) == (10, 5, 8)
    assert overall["attempts"] == sum(len(v) for v in judged.values()) and overall["retests"] == overall["attempts"] - n
    lots = {r["group"]: r for r in rep.yields}
    assert set(lots) == {"L1", "L2"} and lots["L1"]["units"] == 6 and lots["L2"]["units"] == 4
    assert lots["L2"]["passed"] == sum(judged[u][-1] == "pass" for u in ("U07", "U08", "U09", "U10"))
    assert lots["L1"]["first_pass_yield"] == pytest.approx(2 / 6)
    with st.open_store(path, readonly=True) as s:
        days = {r["group"]: r for r in stats.compute(s, by="day").yields}
        assert {k: v["units"] for k, v in days.items()} == {"2026-03-01": 5, "2026-03-02": 5}
        stations = {r["group"]: r["units"] for r in stats.compute(s, by="station").yields}
        assert stations == {"st-1": 5, "st-2": 5}
        only = stats.compute(s, lot="L2", since_utc="2026-03-02T00:00:00.000000Z")
        assert len(only.units) == 4


def test_capability_uses_each_units_first_valid_attempt(line_store):
    path, seqs = line_store
    with st.open_store(path, readonly=True) as s:
        rep = stats.compute(s)
        rows = s.attempts()
    # first valid (pass/fail/inconclusive) attempt per unit, in time order, read back here
    first = {}
    for r in rows:
        if r["verdict"] in ("pass", "fail", "inconclusive") and r["serial"] not in first:
            first[r["serial"]] = r
    assert set(first) == {u for u, seq in seqs.items() if any(v in ("pass", "fail", "inconclusive") for v in seq)}
    order = sorted(first.values(), key=lambda r: r["finished_utc"])
    with st.open_store(path, readonly=True) as s:
        g = np.array([[p["gain_db"] for p in s.points(r["id"])] for r in order])
    (pc,) = rep.capabilities
    assert pc.units == len(order) == 9
    for j, f in enumerate(FREQS):
        c = next(c for c in pc.points if c.frequency_hz == f)
        x = g[:, j]
        assert c.n == x.size and c.mean_db == pytest.approx(np.mean(x)) and c.std_db == pytest.approx(np.std(x, ddof=1))
        sw = np.mean(np.abs(np.diff(x))) / (2 / math.sqrt(math.pi))
        lo, hi = LIMITS[f]
        sides = [v for v in ((hi - np.mean(x)) if hi is not None else None,
                             (np.mean(x) - lo) if lo is not None else None) if v is not None]
        assert c.cpk == pytest.approx(min(sides) / (3 * sw))
        assert c.ppk == pytest.approx(min(sides) / (3 * np.std(x, ddof=1)))
        assert c.outside == int(np.sum(x > hi) + (np.sum(x < lo) if lo is not None else 0))
    assert rep.chart is not None and rep.chart.values.size == 9
    assert rep.chart.frequency_hz == stats.worst_cpk(pc).frequency_hz


def test_junit_has_one_test_case_per_unit_with_the_latest_verdict(line_store):
    path, seqs = line_store
    with st.open_store(path, readonly=True) as s:
        rep = stats.compute(s)
    root = ET.fromstring(stats.junit_xml(rep.units))
    assert root.tag == "testsuites"
    cases = root.findall("./testsuite/testcase")
    assert sorted(c.get("name") for c in cases) == sorted(seqs)
    for c in cases:
        last = [v for v in seqs[c.get("name")] if v != "abandoned"][-1]
        props = {p.get("name"): p.get("value") for p in c.findall("./properties/property")}
        assert props["harness_verdict"] == last
        assert (c.find("failure") is not None) == (last in ("fail", "inconclusive"))
        assert (c.find("error") is not None) == (last == "invalid")
        assert float(c.get("time")) >= 0
    # suite and root counts agree with their test cases (JUnit XML convention)
    for suite in root.findall("testsuite"):
        tc = suite.findall("testcase")
        assert int(suite.get("tests")) == len(tc)
        assert int(suite.get("failures")) == sum(c.find("failure") is not None for c in tc)
        assert int(suite.get("errors")) == sum(c.find("error") is not None for c in tc)
    assert int(root.get("tests")) == 10 and int(root.get("failures")) == 1 and int(root.get("errors")) == 1


def test_csv_has_one_row_per_attempt(line_store):
    path, seqs = line_store
    with st.open_store(path, readonly=True) as s:
        rows = s.attempts()
        text = stats.attempts_csv(rows)
    got = list(csv.DictReader(io.StringIO(text)))
    assert len(got) == sum(len(v) for v in seqs.values()) == len(rows)
    assert [g["uuid"] for g in got] == [r["uuid"] for r in rows]
    assert json.loads(got[1]["reasons"]) == [f"{got[1]['verdict']} reason"]


def test_stats_command_line_tables_json_and_exports(line_store, tmp_path, capsys):
    path, _ = line_store
    out = path.parent
    junit, csvf, rep = tmp_path / "x" / "units.xml", tmp_path / "x" / "attempts.csv", tmp_path / "rep"
    assert main(["stats", "--out", str(out), "--junit", str(junit), "--csv", str(csvf), "--report", str(rep)]) == 0
    text = capsys.readouterr().out
    assert "yield 80.0 %" in text and "first-pass yield 50.0 %" in text and "Cpk" in text
    assert ET.parse(junit).getroot().tag == "testsuites" and csvf.read_text().startswith("uuid,")
    pngs = sorted(rep.glob("*.png"))
    assert {p.name.split("_")[0] for p in pngs} == {"yield", "capability", "histograms", "control-chart"}
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)
    assert main(["stats", "--db", str(path), "--json", "--by", "station", "--lot", "L1"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["units"] == 6 and {r["group"] for r in doc["yield"]} == {"st-1", "st-2"}
    assert doc["capability"][0]["points"][0]["cpk"] is not None
    assert main(["stats", "--db", str(tmp_path / "none.sqlite")]) == 2
    assert "no results store" in capsys.readouterr().err


def test_time_bounds():
    assert st.parse_time("2026-03-02") == "2026-03-02T00:00:00.000000Z"
    assert st.parse_time("2026-03-02T14:30") == "2026-03-02T14:30:00.000000Z"
    assert st.parse_time("2026-03-02T16:30+02:00") == "2026-03-02T14:30:00.000000Z"
    assert st.parse_time("-8h") < st.utc_now()
    with pytest.raises(Exception, match="not a time"):
        st.parse_time("yesterday")
