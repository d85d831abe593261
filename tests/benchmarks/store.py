"""Benchmark 6: the results store and `harness stats`.

Throughput: units recorded per second through `harness.store.Store.record_attempt`
exactly as the line records them: one transaction per unit (attempt row + 100 point
rows), SQLite in WAL mode with ``synchronous=FULL`` (every commit reaches the disk), and
PostgreSQL through psycopg on the server HARNESS_TEST_PG_URL names (skipped when it is
not set). Wall clock per unit (`time.perf_counter`), reported as units per second over
the run, with the median and 95th-percentile time of one unit.

Statistics: the time `harness stats` takes on a store holding `stats_units` units
(default 100,000; one attempt each, a retest for the 4 % that fail, 26 points per
attempt: the frequency grid of fixtures/profile-line-kf8.toml), measured as the
command-line verb does it: open the store read-only, compute every figure (yield by lot,
capability of every point, control chart) and format the tables; and, separately, the
same plus the exports (CSV, JUnit XML, PNG plots) of ``--report``. The store is filled
in bulk beforehand (not timed; executemany in large transactions, COPY on PostgreSQL).

Targets (what a line needs): recording at least 20 units/s per station keeps the store
far from being the bottleneck of a line measuring a unit in 0.5 s or more; `harness
stats` on 100,000 units within 60 s keeps it usable as a shift report.
"""

from __future__ import annotations

import os
import statistics
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np

from .common import Row

BENCH = "6 Results store and stats"
TARGET_UNITS_PER_S = 20.0
TARGET_STATS_S = 60.0
PG_ENV = "HARNESS_TEST_PG_URL"
# the line profile's grid (fixtures/profile-line-kf8.toml at 48 kS/s), rounded
LINE_FREQS = (105.5, 175.8, 246.1, 316.4, 410.2, 550.8, 738.3, 996.1, 1324.2, 1769.5, 2378.9, 2988.3, 3152.3,
              4207.0, 5613.3, 7207.0, 7488.3, 7605.5, 8003.9, 8402.3, 8777.3, 9996.1, 13324.2, 17777.3, 20003.9,
              22980.5)


def _attempt(serial: str, n_points: int, rng) -> "object":
    from harness import store as st

    f = np.geomspace(20.0, 20000.0, n_points)
    g = rng.normal(0.0, 0.05, n_points)
    now = st.utc_now()
    row = {"uuid": str(uuid.uuid4()), "serial": serial, "attempt_no": 1, "lot": "BENCH", "operator": "bench",
           "station_id": "bench-1", "profile_id": "bench", "profile_revision": "A", "verdict": "pass",
           "exit_code": 0, "reasons": '["every point meets the mask"]', "worst_margin_db": 0.1,
           "worst_frequency_hz": 1000.0, "worst_expanded_gain_db": 0.02, "n_points": n_points,
           "certificate_file": f"/records/{serial}.json", "certificate_sha256": "0" * 64, "raw_sha256": "1" * 64,
           "started_utc": now, "finished_utc": now}
    pts = [{"idx": i, "frequency_hz": float(f[i]), "gain_db": float(g[i]), "phase_deg": 0.0, "u_gain_db": 0.01,
            "expanded_gain_db": 0.02, "u_phase_deg": 0.05, "expanded_phase_deg": 0.1, "limit_low_db": -0.3,
            "limit_high_db": 0.3, "margin_db": float(0.3 - abs(g[i])), "snr_db": 90.0, "verdict": "pass"}
           for i in range(n_points)]
    return st.Attempt(row, pts)


def throughput(url: str, units: int, points: int) -> dict:
    """Record `units` attempts of `points` points, one transaction each."""
    from harness import store as st

    rng = np.random.default_rng(6)
    recs = [_attempt(f"BENCH-{i:06d}", points, rng) for i in range(units)]
    with st.open_store(url) as s:
        s.record_attempt(_attempt("WARMUP", points, rng))           # connection, page cache
        times = []
        t0 = time.perf_counter()
        for r in recs:
            t = time.perf_counter()
            s.record_attempt(r)
            times.append(time.perf_counter() - t)
        total = time.perf_counter() - t0
        assert s.counts()["points"] == (units + 1) * points
    times.sort()
    return {"units": units, "points_per_unit": points, "seconds": total, "units_per_s": units / total,
            "points_per_s": units * points / total, "median_unit_s": statistics.median(times),
            "p95_unit_s": times[int(0.95 * (len(times) - 1))]}


def fill_for_stats(url: str, units: int, seed: int = 1) -> dict:
    """A line's worth of units written in bulk (not timed): 40 lots, 4 stations, 30 days,
    4 % fail and are retested once; 26 points each (KF-8 grid) with the gain spread of a
    real lot."""
    from sqlalchemy import insert

    from harness import store as st

    rng = np.random.default_rng(seed)
    f = np.array(LINE_FREQS)
    nominal = -10.0 * np.log10(1.0 + (f / 8000.0) ** 8)
    lo = np.where(f <= 3000, -0.3, np.where((f >= 7200) & (f <= 8800), nominal - 0.8, np.nan))
    hi = np.where(f <= 3000, 0.3, np.where((f >= 7200) & (f <= 8800), nominal + 0.8,
                                           np.where(f >= 20000, -30.0, np.nan)))
    t0 = np.datetime64("2026-03-01T06:00:00")
    n_att = 0
    s = st.open_store(url)
    a, p = s.tables["attempts"], s.tables["points"]
    chunk = 5000
    attempt_id = 0
    with s.engine.begin() as conn:
        pg = conn.dialect.name == "postgresql"
        for start in range(0, units, chunk):
            arows, prows = [], []
            for i in range(start, min(start + chunk, units)):
                fails = rng.random() < 0.04
                scale = 1.0 + rng.normal(0.0, 0.01)
                gain = -10.0 * np.log10(1.0 + (f / (8000.0 * scale)) ** 8) + rng.normal(0.0, 0.04)
                for k, verdict in enumerate(("fail", "pass") if fails else ("pass",)):
                    attempt_id += 1
                    g = gain + rng.normal(0.0, 0.005, f.size) + (0.5 if verdict == "fail" else 0.0)
                    t = str(t0 + np.timedelta64(int(i * 25.0 + k * 5), "s")) + ".000000Z"
                    arows.append({"id": attempt_id, "uuid": str(uuid.UUID(int=rng.integers(0, 2**63) << 64 | attempt_id)),
                                  "serial": f"KF8-{i:07d}", "attempt_no": k + 1, "lot": f"L{i * 40 // units:02d}",
                                  "operator": "op", "station_id": f"line-{i % 4 + 1}", "profile_id": "kestrel-kf8-line",
                                  "profile_revision": "A", "verdict": verdict, "exit_code": 0 if verdict == "pass" else 1,
                                  "reasons": "[]", "worst_margin_db": 0.1, "worst_frequency_hz": 8000.0,
                                  "n_points": int(f.size), "duplicate": 0, "started_utc": t, "finished_utc": t,
                                  "recorded_utc": t})
                    for j in range(f.size):
                        prows.append((attempt_id, j, float(f[j]), float(g[j]), 0.01, 0.02,
                                      None if np.isnan(lo[j]) else float(lo[j]), None if np.isnan(hi[j]) else float(hi[j])))
            n_att += len(arows)
            conn.execute(insert(a), arows)
            cols = ("attempt_id", "idx", "frequency_hz", "gain_db", "u_gain_db", "expanded_gain_db", "limit_low_db",
                    "limit_high_db")
            if pg:
                raw = conn.connection.driver_connection
                with raw.cursor().copy(f"COPY points ({', '.join(cols)}) FROM STDIN") as cp:
                    for r in prows:
                        cp.write_row(r)
            else:
                conn.execute(insert(p), [dict(zip(cols, r)) for r in prows])
        if pg:
            conn.exec_driver_sql("SELECT setval(pg_get_serial_sequence('attempts', 'id'), "
                                 "(SELECT MAX(id) FROM attempts))")
    s.close()
    return {"units": units, "attempts": n_att, "points": n_att * int(f.size)}


def stats_time(url: str, report_dir: Path | None) -> dict:
    from harness import stats
    from harness.store import open_store

    t0 = time.perf_counter()
    with open_store(url, readonly=True) as s:
        rep = stats.compute(s, by="lot")
    text = stats.format_report(rep)
    t_tables = time.perf_counter() - t0
    out = {"tables_s": t_tables, "units": len(rep.units), "attempts": len(rep.attempts),
           "lowest_cpk": None, "report_lines": text.count("\n") + 1}
    w = stats.worst_cpk(rep.capabilities[0]) if rep.capabilities else None
    if w is not None:
        out["lowest_cpk"] = w.cpk
        out["lowest_cpk_hz"] = w.frequency_hz
    if report_dir is not None:
        t1 = time.perf_counter()
        stats.write_report(rep, report_dir)
        out["exports_s"] = time.perf_counter() - t1
        out["tables_and_exports_s"] = t_tables + out["exports_s"]
    return out


def _pg_schema(base: str):
    """A fresh schema on the benchmark server and the URL that uses it."""
    from sqlalchemy import create_engine, text

    schema = "bench_" + uuid.uuid4().hex[:10]
    eng = create_engine(base)
    with eng.begin() as c:
        c.execute(text(f"CREATE SCHEMA {schema}"))
    sep = "&" if "?" in base else "?"
    return eng, schema, f"{base}{sep}options=-csearch_path%3D{schema}"


def _pg_drop(eng, schema):
    from sqlalchemy import text

    with eng.begin() as c:
        c.execute(text(f"DROP SCHEMA {schema} CASCADE"))
    eng.dispose()


def run(*, units: int = 500, points: int = 100, stats_units: int = 100_000, report: bool = True,
        postgresql: bool = True) -> dict:
    """Run benchmark 6 (see the module docstring)."""
    pg_base = os.environ.get(PG_ENV) if postgresql else None
    results = {"throughput": {}, "stats": {}, "postgresql": "server: " + ("given" if pg_base else
                                                                           f"none ({PG_ENV} not set)")}
    rows = []
    with tempfile.TemporaryDirectory(prefix="harness-bench-store-") as tmp:
        tmp = Path(tmp)
        backends = [("SQLite (WAL, synchronous=FULL)", "sqlite:///" + str(tmp / "t.sqlite"), None)]
        if pg_base:
            eng, schema, url = _pg_schema(pg_base)
            backends.append(("PostgreSQL (psycopg, local server)", url, (eng, schema)))
        for name, url, cleanup in backends:
            try:
                r = throughput(url, units, points)
                results["throughput"][name] = r
                rows.append(Row(BENCH, f"record: {name}, {points} points/unit", r["units_per_s"], None, "units/s",
                                None, "", f">= {TARGET_UNITS_PER_S:g} units/s",
                                bool(r["units_per_s"] >= TARGET_UNITS_PER_S),
                                extra={"median_unit_s": r["median_unit_s"], "p95_unit_s": r["p95_unit_s"]}))
            finally:
                if cleanup:
                    _pg_drop(*cleanup)
        stats_backends = [("SQLite", "sqlite:///" + str(tmp / "s.sqlite"), None)]
        if pg_base:
            eng, schema, url = _pg_schema(pg_base)
            stats_backends.append(("PostgreSQL", url, (eng, schema)))
        for name, url, cleanup in stats_backends:
            try:
                t = time.perf_counter()
                filled = fill_for_stats(url, stats_units)
                fill_s = time.perf_counter() - t
                r = stats_time(url, (tmp / f"report-{name}") if report else None)
                r.update(filled, fill_s=fill_s)
                results["stats"][name] = r
                rows.append(Row(BENCH, f"harness stats (tables), {name}, {stats_units:,} units", r["tables_s"], None,
                                "s", None, "", f"<= {TARGET_STATS_S:g} s", bool(r["tables_s"] <= TARGET_STATS_S),
                                extra={"attempts": filled["attempts"], "points": filled["points"]}))
                if report:
                    rows.append(Row(BENCH, f"harness stats --report (+CSV/JUnit/PNG), {name}",
                                    r["tables_and_exports_s"], None, "s", None, "", f"<= {TARGET_STATS_S:g} s",
                                    bool(r["tables_and_exports_s"] <= TARGET_STATS_S)))
            finally:
                if cleanup:
                    _pg_drop(*cleanup)
    return {"name": "store", "rows": rows, "results": results,
            "settings": {"units": units, "points": points, "stats_units": stats_units, "stats_points": len(LINE_FREQS),
                         "report": report, "postgresql": bool(pg_base)}}
