"""Results store (harness.store) on SQLite and on a real PostgreSQL server.

PostgreSQL: the tests read HARNESS_TEST_PG_URL (``.ci/services/postgres.sh`` starts a
throwaway server and exports it). Without it they skip locally with a message saying
how to enable them; in CI (``CI`` set) they fail. Each PostgreSQL test works in a schema
of its own (``search_path``), dropped afterwards.

What is checked against something outside the harness: SQLite's own
``PRAGMA integrity_check`` and ``foreign_key_check``, SHA-256 digests recomputed with
hashlib from the files on disk, the stored points against the certificate JSON, and
crash safety with real processes killed by SIGKILL (POSIX signal 9: no cleanup code
runs, so only the database's own atomic commit protects the data).
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

from harness import store as st
from harness.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
PG_ENV = "HARNESS_TEST_PG_URL"
PG_HOWTO = ("PostgreSQL store tests need a server: run `source .ci/services/postgres.sh` (starts a throwaway "
            "cluster and exports HARNESS_TEST_PG_URL), then run pytest again")


# --------------------------------------------------------------------------------------
# backends
# --------------------------------------------------------------------------------------
def pg_base_url() -> str:
    url = os.environ.get(PG_ENV)
    if not url:
        if os.environ.get("CI"):
            pytest.fail(f"CI must run the PostgreSQL store tests but {PG_ENV} is not set: "
                        ".ci/services/postgres.sh did not start the server (see its output)")
        pytest.skip(PG_HOWTO)
    return url


def _pg_schema_url(base: str, schema: str) -> str:
    sep = "&" if "?" in base else "?"
    return f"{base}{sep}options=-csearch_path%3D{schema}"


@pytest.fixture
def pg_url():
    """A fresh PostgreSQL schema on the test server, dropped afterwards."""
    from sqlalchemy import create_engine, text

    base = pg_base_url()
    schema = "t_" + uuid.uuid4().hex[:12]
    eng = create_engine(base)
    try:
        with eng.begin() as c:
            c.execute(text(f"CREATE SCHEMA {schema}"))
    except Exception as exc:  # noqa: BLE001
        eng.dispose()
        if os.environ.get("CI"):
            pytest.fail(f"PostgreSQL at {st.describe_url(base)} unusable: {exc}")
        pytest.skip(f"PostgreSQL at {st.describe_url(base)} unusable ({exc}); {PG_HOWTO}")
    yield _pg_schema_url(base, schema)
    with eng.begin() as c:
        c.execute(text(f"DROP SCHEMA {schema} CASCADE"))   # test cleanup (the harness never deletes)
    eng.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request, tmp_path):
    if request.param == "sqlite":
        return "sqlite:///" + str(tmp_path / "store" / "results.sqlite")
    return request.getfixturevalue("pg_url")


def synthetic_attempt(serial: str, *, points: int = 100, verdict: str = "pass", attempt_no: int = 1,
                      lot: str = "L1", station: str = "st-1", seed: int = 0, t: str | None = None) -> st.Attempt:
    import numpy as np

    rng = np.random.default_rng(seed)
    f = np.geomspace(20.0, 20000.0, points)
    g = rng.normal(0.0, 0.05, points)
    now = t or st.utc_now()
    row = {"uuid": str(uuid.uuid4()), "serial": serial, "attempt_no": attempt_no, "lot": lot, "operator": "op",
           "station_id": station, "profile_id": "prof", "profile_revision": "A", "verdict": verdict,
           "exit_code": {"pass": 0, "fail": 1, "inconclusive": 3, "invalid": 4, "abandoned": 4}[verdict],
           "reasons": json.dumps([verdict]), "worst_margin_db": float(0.3 - np.max(np.abs(g))),
           "worst_frequency_hz": float(f[np.argmax(np.abs(g))]), "n_points": points,
           "started_utc": now, "finished_utc": now}
    pts = [{"idx": i, "frequency_hz": float(f[i]), "gain_db": float(g[i]), "u_gain_db": 0.01,
            "expanded_gain_db": 0.02, "limit_low_db": -0.3, "limit_high_db": 0.3,
            "margin_db": float(0.3 - abs(g[i])), "verdict": "pass"} for i in range(points)]
    return st.Attempt(row, pts)


# --------------------------------------------------------------------------------------
# schema, round trip, append-only
# --------------------------------------------------------------------------------------
def test_store_is_created_with_every_migration(store_url):
    with st.open_store(store_url) as s:
        assert s.schema_version() == st.SCHEMA_VERSION
        with s.engine.connect() as c:
            versions = [r[0] for r in c.exec_driver_sql("SELECT version FROM schema_migrations ORDER BY version")]
        assert versions == [m[0] for m in st.MIGRATIONS]
        assert s.counts() == {"sessions": 0, "attempts": 0, "points": 0, "events": 0}
        assert s.check() == []
    # opening again applies nothing and keeps the version
    with st.open_store(store_url) as s:
        assert s.schema_version() == st.SCHEMA_VERSION


def test_sqlite_store_uses_write_ahead_log_and_full_sync(tmp_path):
    path = tmp_path / "deep" / "folder" / "r.sqlite"          # created on first use
    with st.open_store(path) as s:
        with s.engine.connect() as c:
            assert c.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
            assert c.exec_driver_sql("PRAGMA synchronous").scalar() == 2        # FULL (SQLite docs: 2)
    assert path.is_file()


def _measure_kf8(tmp_path, serial="KF8-T-1"):
    """One real measured KF-8 unit (simulated board), its certificate files on disk."""
    from harness.measure import make_backend, measure_unit
    from harness.profile import load_profile
    from harness.station import load_station

    prof = load_profile(ROOT / "fixtures" / "profile-line-kf8.toml")
    station = load_station(ROOT / "fixtures" / "station-line-48k.toml")
    return measure_unit(prof, station, serial, backend=make_backend(station), out_dir=tmp_path / "certs",
                        write_plot=False)


def test_measured_attempt_round_trips_with_digests_of_the_files(store_url, tmp_path):
    res = _measure_kf8(tmp_path)
    rec = st.attempt_from_result(res, attempt_no=1, started_utc=st.utc_now(), lot="L7", operator="kim")
    with st.open_store(store_url) as s:
        aid = s.record_attempt(rec)
        (row,) = s.attempts(serial=res.serial)
        pts = s.points(aid)
    # digests recomputed here with hashlib from the files on disk
    assert row["certificate_sha256"] == hashlib.sha256(res.json_path.read_bytes()).hexdigest()
    assert row["raw_sha256"] == hashlib.sha256(res.raw_path.read_bytes()).hexdigest()
    cert = json.loads(res.json_path.read_text())
    assert row["verdict"] == cert["verdict"] and row["lot"] == "L7" and row["operator"] == "kim"
    assert row["profile_sha256"] == cert["profile"]["sha256"] and row["station_id"] == cert["station"]["id"]
    assert row["n_points"] == len(cert["points"]) == len(pts)
    for p, c in zip(pts, cert["points"]):
        for k, ck in (("frequency_hz", "frequency_hz"), ("gain_db", "gain_db"), ("u_gain_db", "u_gain_db"),
                      ("expanded_gain_db", "U_gain_db"), ("limit_low_db", "limit_low_db"),
                      ("limit_high_db", "limit_high_db"), ("margin_db", "margin_db")):
            assert (p[k] is None and c[ck] is None) or p[k] == pytest.approx(c[ck], rel=1e-12, abs=1e-12)
    worst = min((c for c in cert["points"] if c["margin_db"] is not None), key=lambda c: c["margin_db"])
    assert row["worst_margin_db"] == pytest.approx(worst["margin_db"])


def test_store_refuses_update_and_delete(store_url):
    from sqlalchemy import text
    from sqlalchemy.exc import DBAPIError

    with st.open_store(store_url) as s:
        s.record_attempt(synthetic_attempt("A-1", points=3))
        s.log_event(None, "note", "A-1")
        for sql in ("UPDATE attempts SET verdict = 'fail'", "DELETE FROM attempts", "DELETE FROM points",
                    "UPDATE points SET gain_db = 0", "DELETE FROM events", "DELETE FROM schema_migrations"):
            with pytest.raises(DBAPIError, match="append-only"):
                with s.engine.begin() as c:
                    c.execute(text(sql))
        assert s.counts()["attempts"] == 1 and s.counts()["points"] == 3
        assert s.attempts()[0]["verdict"] == "pass"


def test_old_store_is_migrated_keeping_its_records(store_url):
    from sqlalchemy import text

    from sqlalchemy import create_engine

    # a store as the first release left it (migration 1 only), with one attempt in it
    url = store_url

    if url.startswith("sqlite"):
        Path(url.split("///", 1)[1]).parent.mkdir(parents=True, exist_ok=True)
        eng = st._sqlite_engine(url, readonly=False)
    else:
        eng = create_engine(url)
    assert st._migrate(eng, target=1) == [1]
    with eng.begin() as c:
        c.execute(text("INSERT INTO attempts (uuid, serial, attempt_no, station_id, profile_id, verdict, n_points, "
                       "duplicate, started_utc, finished_utc, recorded_utc) VALUES ('old-1', 'SN-OLD', 1, 'st', "
                       "'prof', 'fail', 0, 0, '2025-01-01T00:00:00.000000Z', '2025-01-01T00:00:01.000000Z', "
                       "'2025-01-01T00:00:01.000000Z')"))
        assert c.execute(text("SELECT MAX(version) FROM schema_migrations")).scalar() == 1
    eng.dispose()
    with pytest.raises(st.StoreError, match="schema version 1"):
        st.open_store(url, migrate=False)
    with st.open_store(url) as s:
        assert s.schema_version() == st.SCHEMA_VERSION
        (old,) = s.attempts(serial="SN-OLD")
        assert old["uuid"] == "old-1" and old["verdict"] == "fail"
        s.log_event(None, "after-migration", "SN-OLD")              # table of migration 2
        assert [e["kind"] for e in s.events()] == ["after-migration"]


def test_newer_schema_is_refused_and_left_alone(store_url):
    from sqlalchemy import text

    with st.open_store(store_url) as s:
        with s.engine.begin() as c:
            c.execute(text("INSERT INTO schema_migrations (version, description, applied_utc) "
                           "VALUES (99, 'from the future', '2099-01-01T00:00:00Z')"))
    for ro in (False, True):
        with pytest.raises(st.StoreError, match="newer than this harness"):
            st.open_store(store_url, readonly=ro)


def test_unreachable_server_and_bad_urls_are_clear_errors(tmp_path):
    with pytest.raises(st.StoreError, match="cannot open the results store"):
        st.open_store("postgresql+psycopg://nobody@127.0.0.1:1/none")       # port 1: refused
    with pytest.raises(ConfigError, match="psycopg"):
        st.open_store("postgresql+psycopg2://x@h/db")
    with pytest.raises(ConfigError, match="unsupported database"):
        st.open_store("mysql://x@h/db")
    with pytest.raises(st.StoreError, match="no results store"):
        st.open_store(tmp_path / "missing.sqlite", readonly=True)


def test_database_section_of_a_station_file(tmp_path):
    from harness.station import load_station

    base = (ROOT / "fixtures" / "station-line-48k.toml").read_text().replace(
        'device_model = "dut-kf8-line.toml"', f'device_model = "{ROOT / "fixtures" / "dut-kf8-line.toml"}"')
    f = tmp_path / "s.toml"
    f.write_text(base + '\n[database]\nurl = "postgresql+psycopg://line@db.example:5432/kf8"\n'
                 'password_env = "HARNESS_TEST_DB_PW"\n')
    stn = load_station(f)
    cfg = stn.section("database")
    with pytest.raises(ConfigError, match="HARNESS_TEST_DB_PW is not set"):
        st.database_url(cfg, tmp_path)
    os.environ["HARNESS_TEST_DB_PW"] = "s3cr:t/@"
    try:
        url = st.database_url(cfg, tmp_path)
    finally:
        del os.environ["HARNESS_TEST_DB_PW"]
    from sqlalchemy.engine import make_url

    assert make_url(url).password == "s3cr:t/@" and "s3cr" not in st.describe_url(url)
    f.write_text(base + '\n[database]\nurl = "postgresql+psycopg2://line@db/kf8"\n')
    with pytest.raises(ConfigError, match=r"database\.url: PostgreSQL URLs must name the psycopg driver"):
        load_station(f)
    f.write_text(base + '\n[database]\nurl = "postgresql://line@db/kf8"\n')   # the psycopg driver is implied
    assert st.database_url(load_station(f).section("database"), tmp_path).startswith("postgresql+psycopg://")
    f.write_text(base + '\n[database]\nfile = "r.sqlite"\nurl = "sqlite:///x"\n')
    with pytest.raises(ConfigError, match="database.file: give either url"):
        load_station(f)
    f.write_text(base + '\n[database]\nfile = "records/line.sqlite"\n')
    assert st.database_url(load_station(f).section("database"), "/elsewhere") == \
        "sqlite:///" + str((tmp_path / "records" / "line.sqlite").resolve())
    assert st.database_url(None, tmp_path) == "sqlite:///" + str((tmp_path / "harness-results.sqlite").resolve())


def test_spooled_attempt_is_recorded_once(tmp_path):
    rec = synthetic_attempt("SP-1", points=4)
    path = st.spool_attempt(tmp_path, rec)
    assert json.loads(path.read_text())["row"]["uuid"] == rec.row["uuid"]
    with st.open_store(tmp_path / "r.sqlite") as s:
        assert st.replay_spool(s, tmp_path) == [rec.row["uuid"]]
        assert st.replay_spool(s, tmp_path) == []                    # renamed *.recorded
        # a spool file replayed again by hand is not stored twice
        s.record_attempt(st.Attempt(dict(rec.row), rec.points), spool_file="again")
        assert s.counts()["attempts"] == 1 and s.counts()["points"] == 4


# --------------------------------------------------------------------------------------
# concurrency and crashes, with real processes
# --------------------------------------------------------------------------------------
WRITER = r"""
import json, sys, time
sys.path.insert(0, {root!r})
from tests.test_store import synthetic_attempt
from harness import store as st
url, tag, n, points = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
s = st.open_store(url)
print("ready", flush=True)
for i in range(n):
    rec = synthetic_attempt(f"{{tag}}-{{i:05d}}", points=points, seed=i)
    print("begin", rec.row["uuid"], flush=True)
    s.record_attempt(rec)
    print("done", rec.row["uuid"], flush=True)
s.close()
"""


def _writer(url: str, tag: str, n: int, points: int) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", WRITER.format(root=str(ROOT)), url, tag, str(n), str(points)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=str(ROOT))


def test_two_station_processes_writing_concurrently_lose_nothing(store_url):
    # both start on a store that does not exist yet: the migration lock is exercised too
    n, points = 40, 100
    procs = [_writer(store_url, f"ST{k}", n, points) for k in (1, 2)]
    outs = [p.communicate(timeout=120) for p in procs]
    for p, (out, err) in zip(procs, outs):
        assert p.returncode == 0, err
    done = {line.split()[1] for out, _ in outs for line in out.splitlines() if line.startswith("done")}
    assert len(done) == 2 * n
    with st.open_store(store_url, readonly=True) as s:
        assert s.check() == []
        rows = s.attempts(columns=("uuid", "serial"))
        assert {r["uuid"] for r in rows} == done
        assert s.counts()["points"] == 2 * n * points
        assert s.schema_version() == st.SCHEMA_VERSION
        with s.engine.connect() as c:
            assert c.exec_driver_sql("SELECT COUNT(*) FROM schema_migrations").scalar() == len(st.MIGRATIONS)


def _in_write_transaction(url: str, timeout_s: float = 10.0) -> bool:
    """Wait until a writer is inside a write transaction, seen from outside: SQLite's
    write lock is held (BEGIN IMMEDIATE from here fails at once), or PostgreSQL lists a
    `harness` connection with a transaction id (it has written) in pg_stat_activity."""
    import sqlite3

    from sqlalchemy import create_engine, text

    deadline = time.monotonic() + timeout_s
    if url.startswith("sqlite"):
        con = sqlite3.connect(url.split("///", 1)[1], timeout=0, isolation_level=None)
        try:
            while time.monotonic() < deadline:
                try:
                    con.execute("BEGIN IMMEDIATE")
                    con.execute("ROLLBACK")
                except sqlite3.OperationalError as exc:
                    if "locked" in str(exc):
                        return True
                    raise
        finally:
            con.close()
        return False
    eng = create_engine(url)
    try:
        with eng.connect() as c:
            while time.monotonic() < deadline:
                n = c.execute(text("SELECT count(*) FROM pg_stat_activity WHERE application_name = 'harness' "
                                   "AND backend_xid IS NOT NULL AND pid <> pg_backend_pid()")).scalar()
                c.commit()
                if n:
                    return True
        return False
    finally:
        eng.dispose()


def test_kill_9_in_the_middle_of_a_write_loses_at_most_that_attempt(store_url):
    """A writer recording large attempts is killed with SIGKILL while the database shows
    it inside a write transaction: every attempt it finished is there, the one in flight
    is there whole or not at all, and the store passes its consistency checks."""
    points = 4000                                  # a long transaction
    before: set = set()
    for round_ in range(2):
        p = _writer(store_url, f"K{round_}", 1000, points)
        seen = []
        for line in p.stdout:                      # one attempt committed: the writer is running
            seen.append(line)
            if line.startswith("done"):
                break
        assert _in_write_transaction(store_url), "the writer never held a write transaction"
        os.kill(p.pid, signal.SIGKILL)
        seen += p.stdout.read().splitlines()
        p.wait(timeout=30)
        assert p.returncode == -signal.SIGKILL
        words = [ln.split() for ln in seen if ln.strip()]
        begun = {w[1] for w in words if w[0] == "begin"}
        done = {w[1] for w in words if w[0] == "done"}
        in_flight = begun - done
        assert len(in_flight) <= 1
        with st.open_store(store_url, readonly=True) as s:
            assert s.check() == []                   # integrity_check (SQLite), point counts, orphans
            rows = s.attempts(columns=("id", "uuid", "n_points"))
            new = {r["uuid"] for r in rows} - before
            assert done <= new <= done | in_flight
            for r in rows:
                assert len(s.points(r["id"])) == r["n_points"]
            before |= new
    with st.open_store(store_url) as s:             # and the store takes new writes afterwards
        s.record_attempt(synthetic_attempt("AFTER-1", points=5))
        assert s.check() == []


def test_kill_9_of_a_running_line_leaves_a_consistent_store(tmp_path):
    """A real `harness line` process measuring and recording KF-8 boards is killed with
    SIGKILL at a random moment: the store passes SQLite's integrity check, every attempt
    the line reported as recorded is there with all its points, and at most one
    certificate on disk (the unit in flight) has no record."""
    serials = tmp_path / "serials.txt"
    serials.write_text("\n".join(f"KF8-K9-{i:04d}" for i in range(1, 400)) + "\n")
    out = tmp_path / "line"
    cmd = [sys.executable, "-m", "harness", "line", str(ROOT / "fixtures" / "profile-line-kf8.toml"),
           "--station", str(ROOT / "fixtures" / "station-line-48k.toml"), "--serials", str(serials),
           "--out", str(out), "--lot", "K9", "--operator", "ci", "--json"]
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, cwd=str(tmp_path),
                         env={**os.environ, "MPLBACKEND": "Agg"})
    reported = []
    for line in p.stdout:
        ev = json.loads(line)
        if ev["event"] == "attempt":
            reported.append(ev["attempt_uuid"])
            if len(reported) >= 6:
                time.sleep(0.013 * (len(reported) % 5))   # land somewhere in the next unit
                os.kill(p.pid, signal.SIGKILL)
                break
    p.wait(timeout=30)
    assert p.returncode == -signal.SIGKILL, "the line ended before it was killed"
    with st.open_store(out / "harness-results.sqlite", readonly=True) as s:
        assert s.check() == []
        with s.engine.connect() as c:
            assert c.exec_driver_sql("PRAGMA integrity_check").scalar() == "ok"
        rows = s.attempts(columns=("id", "uuid", "n_points", "certificate_file", "certificate_sha256"))
        assert set(reported) <= {r["uuid"] for r in rows}
        assert len(rows) <= len(reported) + 1
        for r in rows:
            assert len(s.points(r["id"])) == r["n_points"] > 0
            assert hashlib.sha256(Path(r["certificate_file"]).read_bytes()).hexdigest() == r["certificate_sha256"]
        recorded_files = {Path(r["certificate_file"]).name for r in rows}
    on_disk = {f.name for f in out.glob("KF8-K9-*.json")}
    assert len(on_disk - recorded_files) <= 1
    assert not list(out.glob("KF8-K9-*.json.tmp*"))
