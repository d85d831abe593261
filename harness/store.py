"""Results store: every measured attempt of a production line, kept for good.

One relational database through SQLAlchemy Core:

* a SQLite file by default (``harness-results.sqlite`` in the line's output folder,
  created on first use, write-ahead log, ``synchronous=FULL``), enough for one station;
* PostgreSQL (driver psycopg) when the station's ``[database]`` section gives a URL, so
  that several stations of a line write into one shared database.

What is stored, per attempt (one measurement of one unit): serial, attempt number,
verdict, exit code, reasons, worst margin, the per-point results with their
uncertainties and limits, the SHA-256 of the certificate file and of the raw capture,
the certificate's signature fingerprint, station, calibration, profile, operator, lot,
work order and time stamps. Line sessions and events (start, end, abandoned unit,
duplicate serial) are kept too.

Guarantees:

* **Append-only.** The harness only ever INSERTs. Triggers in the database refuse
  UPDATE and DELETE on the result tables, so not even a mistaken query loses a record.
* **Atomic per attempt.** An attempt and all its points are one transaction: a crash or
  ``kill -9`` at any moment leaves either the whole attempt or nothing of it.
* **Versioned schema.** ``schema_migrations`` lists the applied migrations; opening a
  store applies the missing ones in one locked transaction (SQLite ``BEGIN IMMEDIATE``,
  PostgreSQL advisory lock), so two stations starting together migrate once. A database
  newer than this harness is refused, never modified.

Station file::

    [database]
    url = "postgresql+psycopg://line@db.plant.example:5432/kf8"   # optional
    password_env = "HARNESS_DB_PASSWORD"   # optional: the password, read from this variable
    file = "results/line.sqlite"           # optional SQLite file (relative to the station file)
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import socket
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

from harness.errors import EXIT_USAGE, ConfigError, HarnessError

DEFAULT_SQLITE_NAME = "harness-results.sqlite"
VERDICTS = ("pass", "fail", "inconclusive", "invalid", "abandoned")
_PG_LOCK_KEY = 0x6861726E657373   # advisory lock id of schema migrations ("harness")


class StoreError(HarnessError):
    """The results store cannot be opened or written (bad URL, server down, a schema
    newer than this harness). Exit code 2: the line must not run without its store."""

    exit_code = EXIT_USAGE


# --------------------------------------------------------------------------------------
# station file section
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class DatabaseConfig:
    """The ``[database]`` section of a station file.

    Attributes
    ----------
    url : str or None
        SQLAlchemy URL of a shared database (``postgresql+psycopg://user@host:port/db``;
        ``sqlite:///path`` also works). None: a SQLite file.
    file : Path or None
        SQLite file; None: ``harness-results.sqlite`` in the output folder.
    password_env : str or None
        Name of an environment variable holding the database password (keeps passwords
        out of station files).
    source : str or None
        The station file (for messages).
    """

    url: str | None = None
    file: Path | None = None
    password_env: str | None = None
    source: str | None = None


def parse_config(table, *, base_dir: Path, station_id: str, backend: str) -> DatabaseConfig:
    """Validate a station's ``[database]`` table (see the module docstring)."""
    table.check_known(("url", "file", "password_env"))
    url = table.str("url", None)
    file = table.str("file", None)
    if url is not None and file is not None:
        raise table.error("file", "give either url (a database server) or file (SQLite), not both")
    if url is not None:
        _check_url(url, table.file, table.key("url"))
    pw = table.str("password_env", None)
    if pw is not None and not pw.strip():
        raise table.error("password_env", "must name an environment variable")
    path = None
    if file is not None:
        path = Path(file) if Path(file).is_absolute() else Path(base_dir) / file
    return DatabaseConfig(url=url, file=path, password_env=pw, source=table.file)


def _check_url(url: str, file: str | None, key: str | None):
    """The parsed URL, checked: SQLite or PostgreSQL through psycopg (a plain
    ``postgresql://`` URL gets the psycopg driver)."""
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    try:
        u = make_url(url)
    except ArgumentError as exc:
        raise ConfigError(file, key, f"not a database URL ({exc})") from None
    if u.get_backend_name() not in ("sqlite", "postgresql"):
        raise ConfigError(file, key, f"unsupported database '{u.get_backend_name()}': use postgresql+psycopg://... "
                                     "or sqlite:///file")
    if u.get_backend_name() == "postgresql":
        if "+" not in u.drivername:
            u = u.set(drivername="postgresql+psycopg")
        elif u.get_driver_name() != "psycopg":
            raise ConfigError(file, key, f"PostgreSQL URLs must name the psycopg driver: postgresql+psycopg://... "
                                         f"(got driver '{u.get_driver_name()}')")
    return u


def database_url(config: DatabaseConfig | None, out_dir: str | Path, override: str | None = None) -> str:
    """The URL of the store a line uses: `override` (``--db``; a URL or a SQLite file
    path), else the station's ``[database]`` url or file, else
    ``<out_dir>/harness-results.sqlite``. A ``password_env`` is filled in here."""

    if override:
        if "://" not in override:
            return "sqlite:///" + str(Path(override).resolve())
        return _check_url(override, None, "--db").render_as_string(hide_password=False)
    if config is not None and config.url:
        u = _check_url(config.url, config.source, "database.url")
        if config.password_env:
            pw = os.environ.get(config.password_env)
            if pw is None:
                raise ConfigError(config.source, "database.password_env",
                                  f"environment variable {config.password_env} is not set")
            u = u.set(password=pw)
        return u.render_as_string(hide_password=False)
    path = config.file if config is not None and config.file else Path(out_dir) / DEFAULT_SQLITE_NAME
    return "sqlite:///" + str(Path(path).resolve())


def describe_url(url: str) -> str:
    """A URL safe to print (password hidden)."""
    from sqlalchemy.engine import make_url

    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - only for messages
        return "<database>"


# --------------------------------------------------------------------------------------
# schema
# --------------------------------------------------------------------------------------
def utc_now() -> str:
    """The current UTC time as ``YYYY-MM-DDTHH:MM:SS.ffffffZ`` (sorts as text)."""
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _tables():
    """The result tables of the current schema (SQLAlchemy Core metadata)."""
    from sqlalchemy import (Column, Float, ForeignKey, Index, Integer, MetaData, String, Table, Text,
                            UniqueConstraint)

    md = MetaData()
    Table("schema_migrations", md,
          Column("version", Integer, primary_key=True, autoincrement=False),
          Column("description", Text, nullable=False),
          Column("applied_utc", String(32), nullable=False),
          Column("software_version", String(32)))
    Table("sessions", md,
          Column("id", Integer, primary_key=True),
          Column("uuid", String(36), nullable=False, unique=True),
          Column("station_id", Text, nullable=False),
          Column("station_file_sha256", String(64)),
          Column("profile_id", Text),
          Column("profile_revision", Text),
          Column("profile_sha256", String(64)),
          Column("lot", Text),
          Column("work_order", Text),
          Column("operator", Text),
          Column("mode", Text),
          Column("host", Text),
          Column("pid", Integer),
          Column("software_version", String(32)),
          Column("started_utc", String(32), nullable=False))
    Table("attempts", md,
          Column("id", Integer, primary_key=True),
          Column("uuid", String(36), nullable=False, unique=True),
          Column("session_uuid", String(36)),
          Column("serial", Text, nullable=False),
          Column("attempt_no", Integer, nullable=False),
          Column("lot", Text),
          Column("work_order", Text),
          Column("operator", Text),
          Column("station_id", Text, nullable=False),
          Column("station_file_sha256", String(64)),
          Column("profile_id", Text, nullable=False),
          Column("profile_revision", Text),
          Column("profile_sha256", String(64)),
          Column("calibration_id", Text),
          Column("calibration_due_utc", String(32)),
          Column("verdict", String(16), nullable=False),
          Column("exit_code", Integer),
          Column("reasons", Text),                       # JSON list of strings
          Column("worst_margin_db", Float),
          Column("worst_frequency_hz", Float),
          Column("worst_expanded_gain_db", Float),
          Column("n_points", Integer, nullable=False),
          Column("decision_rule", Text),
          Column("confidence", Float),
          Column("certificate_id", Text),
          Column("certificate_file", Text),
          Column("certificate_sha256", String(64)),
          Column("raw_file", Text),
          Column("raw_sha256", String(64)),
          Column("signature_fingerprint", String(64)),
          Column("duplicate", Integer, nullable=False, default=0),
          Column("software_version", String(32)),
          Column("host", Text),
          Column("started_utc", String(32), nullable=False),
          Column("finished_utc", String(32), nullable=False),
          Column("recorded_utc", String(32), nullable=False),
          Index("ix_attempts_serial", "serial"),
          Index("ix_attempts_profile_time", "profile_id", "finished_utc"),
          Index("ix_attempts_lot", "lot"),
          Index("ix_attempts_station", "station_id"))
    Table("points", md,
          Column("attempt_id", Integer, ForeignKey("attempts.id"), primary_key=True, autoincrement=False),
          Column("idx", Integer, primary_key=True, autoincrement=False),
          Column("frequency_hz", Float, nullable=False),
          Column("gain_db", Float),
          Column("phase_deg", Float),
          Column("u_gain_db", Float),
          Column("expanded_gain_db", Float),
          Column("u_phase_deg", Float),
          Column("expanded_phase_deg", Float),
          Column("limit_low_db", Float),
          Column("limit_high_db", Float),
          Column("margin_db", Float),
          Column("snr_db", Float),
          Column("verdict", String(16)))
    Table("events", md,
          Column("id", Integer, primary_key=True),
          Column("session_uuid", String(36)),
          Column("kind", String(32), nullable=False),
          Column("serial", Text),
          Column("detail", Text),                        # JSON
          Column("utc", String(32), nullable=False),
          Index("ix_events_session", "session_uuid"))
    Table("spooled", md,                                   # (v3) attempts replayed from a spool file
          Column("attempt_uuid", String(36), primary_key=True),
          Column("spool_file", Text),
          Column("recorded_utc", String(32), nullable=False),
          UniqueConstraint("attempt_uuid", name="uq_spooled_attempt"))
    return md


_APPEND_ONLY = ("sessions", "attempts", "points", "events", "schema_migrations")


def _append_only_ddl(dialect: str, tables: Iterable[str]) -> list[str]:
    """Triggers refusing UPDATE and DELETE on `tables`."""
    out = []
    if dialect == "sqlite":
        for t in tables:
            for op in ("UPDATE", "DELETE"):
                out.append(f"CREATE TRIGGER IF NOT EXISTS {t}_no_{op.lower()} BEFORE {op} ON {t} "
                           f"BEGIN SELECT RAISE(ABORT, 'harness results store: table {t} is append-only'); END")
    else:
        out.append("CREATE OR REPLACE FUNCTION harness_append_only() RETURNS trigger AS $$ BEGIN "
                   "RAISE EXCEPTION USING MESSAGE = 'harness results store: table ' || TG_TABLE_NAME || ' is append-only'; "
                   "END $$ "
                   "LANGUAGE plpgsql")
        for t in tables:
            out.append(f"DROP TRIGGER IF EXISTS {t}_append_only ON {t}")
            out.append(f"CREATE TRIGGER {t}_append_only BEFORE UPDATE OR DELETE ON {t} "
                       f"FOR EACH ROW EXECUTE FUNCTION harness_append_only()")
    return out


def _m1(conn, md, dialect):
    """Sessions, attempts and their points."""
    for name in ("sessions", "attempts", "points"):
        md.tables[name].create(conn)
    for sql in _append_only_ddl(dialect, ("sessions", "attempts", "points", "schema_migrations")):
        conn.exec_driver_sql(sql)


def _m2(conn, md, dialect):
    """Line events (start, end, abandoned unit, duplicate serial)."""
    md.tables["events"].create(conn)
    for sql in _append_only_ddl(dialect, ("events",)):
        conn.exec_driver_sql(sql)


def _m3(conn, md, dialect):
    """Attempts replayed from a spool file after the store was unreachable."""
    md.tables["spooled"].create(conn)
    for sql in _append_only_ddl(dialect, ("spooled",)):
        conn.exec_driver_sql(sql)


# (version, description, function); append only: a released migration never changes
MIGRATIONS = (
    (1, "sessions, attempts, points; append-only triggers", _m1),
    (2, "events", _m2),
    (3, "spooled attempts", _m3),
)
SCHEMA_VERSION = MIGRATIONS[-1][0]


# --------------------------------------------------------------------------------------
# the store
# --------------------------------------------------------------------------------------
def _num(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass
class Attempt:
    """One attempt as stored (the row of ``attempts`` plus its points)."""

    row: dict
    points: list[dict]


def attempt_from_result(result, *, attempt_no: int, started_utc: str, finished_utc: str | None = None,
                        session_uuid: str | None = None, lot: str | None = None,
                        work_order: str | None = None, operator: str | None = None,
                        duplicate: bool = False, attempt_uuid: str | None = None) -> Attempt:
    """The store record of a measured unit (a `harness.measure.UnitResult`).

    The certificate file's SHA-256 is computed from the file as written.
    """
    import hashlib

    from harness import __version__

    cert = result.certificate
    cert_sha = None
    if result.json_path is not None and Path(result.json_path).is_file():
        cert_sha = hashlib.sha256(Path(result.json_path).read_bytes()).hexdigest()
    w = result.worst
    st = cert.get("station") or {}
    cal = st.get("calibration") or {}
    prof = cert.get("profile") or {}
    sig = cert.get("signature") or {}
    row = {
        "uuid": attempt_uuid or str(uuid.uuid4()),
        "session_uuid": session_uuid,
        "serial": result.serial,
        "attempt_no": int(attempt_no),
        "lot": lot, "work_order": work_order, "operator": operator,
        "station_id": st.get("id") or "?",
        "station_file_sha256": st.get("station_file_sha256"),
        "profile_id": prof.get("id") or "?",
        "profile_revision": prof.get("revision"),
        "profile_sha256": prof.get("sha256"),
        "calibration_id": cal.get("id"),
        "calibration_due_utc": cal.get("due_utc"),
        "verdict": result.verdict,
        "exit_code": int(result.exit_code),
        "reasons": json.dumps(list(result.reasons), ensure_ascii=False),
        "worst_margin_db": None if w is None else _num(w.get("margin_db")),
        "worst_frequency_hz": None if w is None else _num(w.get("frequency_hz")),
        "worst_expanded_gain_db": None if w is None else _num(w.get("U_gain_db")),
        "n_points": len(cert.get("points") or []),
        "decision_rule": (cert.get("decision") or {}).get("rule"),
        "confidence": _num((cert.get("decision") or {}).get("confidence")),
        "certificate_id": cert.get("id"),
        "certificate_file": None if result.json_path is None else str(Path(result.json_path).resolve()),
        "certificate_sha256": cert_sha,
        "raw_file": None if result.raw_path is None else str(Path(result.raw_path).resolve()),
        "raw_sha256": (cert.get("raw") or {}).get("sha256"),
        "signature_fingerprint": sig.get("public_key_fingerprint"),
        "duplicate": 1 if duplicate else 0,
        "software_version": __version__,
        "host": socket.gethostname(),
        "started_utc": started_utc,
        "finished_utc": finished_utc or utc_now(),
    }
    points = []
    for i, p in enumerate(cert.get("points") or []):
        points.append({
            "idx": i, "frequency_hz": _num(p.get("frequency_hz")), "gain_db": _num(p.get("gain_db")),
            "phase_deg": _num(p.get("phase_deg")), "u_gain_db": _num(p.get("u_gain_db")),
            "expanded_gain_db": _num(p.get("U_gain_db")), "u_phase_deg": _num(p.get("u_phase_deg")),
            "expanded_phase_deg": _num(p.get("U_phase_deg")), "limit_low_db": _num(p.get("limit_low_db")),
            "limit_high_db": _num(p.get("limit_high_db")), "margin_db": _num(p.get("margin_db")),
            "snr_db": _num(p.get("snr_db")), "verdict": p.get("verdict"),
        })
    return Attempt(row, points)


class Store:
    """An open results store. Create with `open_store`.

    Writes (`record_attempt`, `start_session`, `log_event`) are single transactions;
    reads (`attempts`, `points_array`, ...) see a consistent snapshot per call.
    """

    def __init__(self, engine, url: str, readonly: bool = False):
        self.engine = engine
        self.url = url
        self.dialect = engine.dialect.name
        self.readonly = readonly
        self.tables = _tables().tables

    # -- lifecycle ---------------------------------------------------------------
    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def describe(self) -> str:
        return describe_url(self.url)

    def schema_version(self) -> int:
        from sqlalchemy import func, select

        t = self.tables["schema_migrations"]
        with self.engine.connect() as conn:
            return int(conn.execute(select(func.max(t.c.version))).scalar() or 0)

    # -- writes ------------------------------------------------------------------
    def _write(self):
        if self.readonly:
            raise StoreError(f"{self.describe()}: opened read-only")
        return self.engine.begin()

    def start_session(self, *, station_id: str, station_file_sha256: str | None = None,
                      profile=None, lot=None, work_order=None, operator=None, mode: str = "line") -> str:
        """Record the start of a line session; returns its uuid."""
        from harness import __version__

        sid = str(uuid.uuid4())
        row = {"uuid": sid, "station_id": station_id, "station_file_sha256": station_file_sha256,
               "profile_id": getattr(profile, "id", None), "profile_revision": getattr(profile, "revision", None),
               "profile_sha256": getattr(profile, "sha256", None), "lot": lot, "work_order": work_order,
               "operator": operator, "mode": mode, "host": socket.gethostname(), "pid": os.getpid(),
               "software_version": __version__, "started_utc": utc_now()}
        with self._write() as conn:
            conn.execute(self.tables["sessions"].insert(), row)
            conn.execute(self.tables["events"].insert(), {"session_uuid": sid, "kind": "session-start",
                                                          "serial": None, "detail": None, "utc": row["started_utc"]})
        return sid

    def log_event(self, session_uuid: str | None, kind: str, serial: str | None = None,
                  detail: dict | None = None) -> None:
        """Append an event (``session-end``, ``abandoned``, ``duplicate``, ...)."""
        with self._write() as conn:
            conn.execute(self.tables["events"].insert(),
                         {"session_uuid": session_uuid, "kind": kind, "serial": serial,
                          "detail": None if detail is None else json.dumps(detail, ensure_ascii=False, sort_keys=True),
                          "utc": utc_now()})

    def record_attempt(self, attempt: Attempt, *, spool_file: str | None = None) -> int:
        """Insert one attempt and its points in one transaction; returns its row id.

        An attempt whose uuid is already stored is not inserted again (replaying a
        spool file is idempotent); its existing id is returned.
        """
        from sqlalchemy import select

        if attempt.row.get("verdict") not in VERDICTS:
            raise ValueError(f"unknown verdict {attempt.row.get('verdict')!r}")
        a, p = self.tables["attempts"], self.tables["points"]
        row = dict(attempt.row)
        row.setdefault("duplicate", 0)
        row["recorded_utc"] = utc_now()
        with self._write() as conn:
            if spool_file is not None:
                old = conn.execute(select(a.c.id).where(a.c.uuid == row["uuid"])).scalar()
                if old is not None:
                    return int(old)
            new_id = conn.execute(a.insert(), row).inserted_primary_key[0]
            if attempt.points:
                conn.execute(p.insert(), [{**pt, "attempt_id": new_id} for pt in attempt.points])
            if spool_file is not None:
                conn.execute(self.tables["spooled"].insert(),
                             {"attempt_uuid": row["uuid"], "spool_file": spool_file, "recorded_utc": row["recorded_utc"]})
        return int(new_id)

    # -- reads -------------------------------------------------------------------
    def attempts(self, *, serial: str | None = None, profile_id: str | None = None, lot: str | None = None,
                 station_id: str | None = None, since_utc: str | None = None, until_utc: str | None = None,
                 columns: Iterable[str] | None = None) -> list[dict]:
        """Attempts matching the filters, oldest first (by finish time, then id)."""
        from sqlalchemy import select

        a = self.tables["attempts"]
        cols = [a.c[c] for c in columns] if columns else [a]
        q = select(*cols)
        q = _filtered(q, a, serial=serial, profile_id=profile_id, lot=lot, station_id=station_id,
                      since_utc=since_utc, until_utc=until_utc)
        q = q.order_by(a.c.finished_utc, a.c.id)
        with self.engine.connect() as conn:
            res = conn.execute(q)
            keys = list(res.keys())
            return [dict(zip(keys, r)) for r in res]

    def points(self, attempt_id: int) -> list[dict]:
        from sqlalchemy import select

        p = self.tables["points"]
        with self.engine.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(select(p).where(p.c.attempt_id == attempt_id)
                                                           .order_by(p.c.idx))]

    def events(self, session_uuid: str | None = None) -> list[dict]:
        from sqlalchemy import select

        e = self.tables["events"]
        q = select(e).order_by(e.c.id)
        if session_uuid is not None:
            q = q.where(e.c.session_uuid == session_uuid)
        with self.engine.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(q)]

    def counts(self) -> dict:
        """Row counts of the result tables."""
        from sqlalchemy import func, select

        with self.engine.connect() as conn:
            return {name: int(conn.execute(select(func.count()).select_from(self.tables[name])).scalar())
                    for name in ("sessions", "attempts", "points", "events")}

    def check(self) -> list[str]:
        """Consistency problems found (empty when none): the database's own integrity
        check (SQLite), attempts whose stored point count differs from their points,
        points without an attempt, unknown verdicts."""
        from sqlalchemy import func, select

        problems = []
        a, p = self.tables["attempts"], self.tables["points"]
        with self.engine.connect() as conn:
            if self.dialect == "sqlite":
                res = [r[0] for r in conn.exec_driver_sql("PRAGMA integrity_check").all()]
                if res != ["ok"]:
                    problems += [f"sqlite integrity_check: {r}" for r in res]
                fk = conn.exec_driver_sql("PRAGMA foreign_key_check").all()
                if fk:
                    problems.append(f"sqlite foreign_key_check: {len(fk)} rows")
            n = select(p.c.attempt_id, func.count().label("n")).group_by(p.c.attempt_id).subquery()
            bad = conn.execute(select(a.c.uuid, a.c.n_points, n.c.n).select_from(a.outerjoin(n, n.c.attempt_id == a.c.id))
                               .where(func.coalesce(n.c.n, 0) != a.c.n_points)).all()
            problems += [f"attempt {u}: {np_} points recorded, {c or 0} stored" for u, np_, c in bad]
            orphans = conn.execute(select(func.count()).select_from(p.outerjoin(a, a.c.id == p.c.attempt_id))
                                   .where(a.c.id.is_(None))).scalar()
            if orphans:
                problems.append(f"{orphans} points without an attempt")
            badv = conn.execute(select(func.count()).select_from(a).where(a.c.verdict.not_in(VERDICTS))).scalar()
            if badv:
                problems.append(f"{badv} attempts with an unknown verdict")
        return problems


def _filtered(q, a, *, serial=None, profile_id=None, lot=None, station_id=None, since_utc=None, until_utc=None):
    if serial is not None:
        q = q.where(a.c.serial == serial)
    if profile_id is not None:
        q = q.where(a.c.profile_id == profile_id)
    if lot is not None:
        q = q.where(a.c.lot == lot)
    if station_id is not None:
        q = q.where(a.c.station_id == station_id)
    if since_utc is not None:
        q = q.where(a.c.finished_utc >= since_utc)
    if until_utc is not None:
        q = q.where(a.c.finished_utc < until_utc)
    return q


# --------------------------------------------------------------------------------------
# opening and migrating
# --------------------------------------------------------------------------------------
def _sqlite_engine(url: str, readonly: bool):
    from sqlalchemy import create_engine, event
    from sqlalchemy.engine import make_url
    from sqlalchemy.pool import NullPool

    u = make_url(url)
    db = u.database
    if not db or db == ":memory:":
        raise StoreError("an in-memory SQLite database would lose every record: give a file")
    path = Path(db)
    if readonly:
        if not path.is_file():
            raise StoreError(f"no results store at {path}")
    else:
        path.parent.mkdir(parents=True, exist_ok=True)
    # NullPool: each use opens its own connection (safe across fork, few connections)
    engine = create_engine(u, poolclass=NullPool, connect_args={"timeout": 60.0})

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _rec):
        # the sqlite3 module's own transaction handling is switched off; SQLAlchemy's
        # "begin" event below starts each transaction (SQLAlchemy's pysqlite recipe)
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA busy_timeout = 60000")
        if not readonly:
            cur.execute("PRAGMA journal_mode = WAL")
        cur.execute("PRAGMA synchronous = FULL")
        cur.execute("PRAGMA foreign_keys = ON")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn):
        # IMMEDIATE: take the write lock at the start, so two writers never deadlock
        # upgrading a read lock; readers use a deferred transaction (a snapshot)
        conn.exec_driver_sql("BEGIN" if readonly else "BEGIN IMMEDIATE")

    return engine


def _pg_engine(url: str):
    from sqlalchemy import create_engine

    return create_engine(url, pool_pre_ping=True, pool_size=2, max_overflow=2,
                         connect_args={"connect_timeout": 10, "application_name": "harness"})


def open_store(url: str | Path, *, readonly: bool = False, migrate: bool = True) -> Store:
    """Open (and on first use create) a results store.

    Parameters
    ----------
    url : str or Path
        SQLAlchemy URL (``sqlite:///file`` or ``postgresql+psycopg://...``) or a path to
        a SQLite file.
    readonly : bool
        Open for reading only (``harness stats``): a missing store is an error, no
        migration is applied, but the schema version must be one this harness knows.
    migrate : bool
        Apply missing migrations (default). False: refuse a store that is not current.

    Raises
    ------
    StoreError
        Unreachable server, a schema newer than this harness, a missing store when
        reading.
    """
    from sqlalchemy.exc import DBAPIError, OperationalError

    url = str(url)
    if "://" not in url:
        url = "sqlite:///" + str(Path(url).resolve())
    u = _check_url(url, None, "database URL")
    url = u.render_as_string(hide_password=False)
    engine = _sqlite_engine(url, readonly) if u.get_backend_name() == "sqlite" else _pg_engine(url)
    store = Store(engine, url, readonly)
    try:
        version = _current_version(engine)
        if version > SCHEMA_VERSION:
            raise StoreError(f"{store.describe()}: schema version {version} is newer than this harness "
                             f"(knows {SCHEMA_VERSION}); upgrade the harness, never the other way round")
        if version < SCHEMA_VERSION:
            if readonly or not migrate:
                if version == 0:
                    raise StoreError(f"{store.describe()}: no results store there (no schema)")
                if not readonly:
                    raise StoreError(f"{store.describe()}: schema version {version}, needs {SCHEMA_VERSION}")
            else:
                _migrate(engine)
    except (OperationalError, DBAPIError) as exc:
        engine.dispose()
        raise StoreError(f"{store.describe()}: cannot open the results store: "
                         f"{str(getattr(exc, 'orig', exc)).strip().splitlines()[0]}") from None
    except StoreError:
        engine.dispose()
        raise
    return store


def _current_version(engine) -> int:
    from sqlalchemy import inspect

    with engine.connect() as conn:
        if not inspect(conn).has_table("schema_migrations"):
            return 0
        return int(conn.exec_driver_sql("SELECT MAX(version) FROM schema_migrations").scalar() or 0)


def _migrate(engine, target: int | None = None) -> list[int]:
    """Apply the missing migrations up to `target` (default: all) in one transaction
    holding the migration lock; returns the versions applied."""
    from sqlalchemy import inspect

    from harness import __version__

    target = SCHEMA_VERSION if target is None else target
    md = _tables()
    applied = []
    with engine.begin() as conn:
        dialect = conn.dialect.name
        if dialect == "postgresql":
            conn.exec_driver_sql(f"SELECT pg_advisory_xact_lock({_PG_LOCK_KEY})")
        # sqlite: the transaction began with BEGIN IMMEDIATE, which is the lock
        if not inspect(conn).has_table("schema_migrations"):
            md.tables["schema_migrations"].create(conn)
        have = {int(r[0]) for r in conn.exec_driver_sql("SELECT version FROM schema_migrations").all()}
        for version, desc, fn in MIGRATIONS:
            if version in have or version > target:
                continue
            fn(conn, md, dialect)
            conn.execute(md.tables["schema_migrations"].insert(),
                         {"version": version, "description": desc, "applied_utc": utc_now(),
                          "software_version": __version__})
            applied.append(version)
    return applied


# --------------------------------------------------------------------------------------
# spool: attempts that could not be recorded (store unreachable)
# --------------------------------------------------------------------------------------
SPOOL_DIR = "unrecorded"


def spool_attempt(out_dir: str | Path, attempt: Attempt) -> Path:
    """Keep an attempt that could not be recorded as a JSON file in
    ``<out_dir>/unrecorded/`` (written atomically, never overwritten); `replay_spool`
    records it later."""
    from harness.certificate import write_new_file

    data = json.dumps({"row": attempt.row, "points": attempt.points}, ensure_ascii=False, sort_keys=True)
    return write_new_file(Path(out_dir) / SPOOL_DIR / f"{attempt.row['uuid']}.json", data.encode("utf-8"))


def replay_spool(store: Store, out_dir: str | Path) -> list[str]:
    """Record every spooled attempt of `out_dir` (idempotent: an attempt already stored
    is skipped). The spool files stay where they are, renamed ``*.recorded``."""
    folder = Path(out_dir) / SPOOL_DIR
    done = []
    if not folder.is_dir():
        return done
    for f in sorted(folder.glob("*.json")):
        doc = json.loads(f.read_text(encoding="utf-8"))
        row = {k: v for k, v in doc["row"].items() if k != "recorded_utc"}
        store.record_attempt(Attempt(row, doc["points"]), spool_file=f.name)
        os.replace(f, f.with_suffix(".json.recorded"))
        done.append(row["uuid"])
    return done


def parse_time(text: str, what: str = "--since") -> str:
    """A user's time bound as the store's UTC text: ``2026-05-20``,
    ``2026-05-20T14:00`` (UTC) or a relative ``-8h`` / ``-2d`` / ``-30m``."""
    t = text.strip()
    try:
        if t.startswith("-") and t[-1] in "mhdw" and t[1:-1].replace(".", "", 1).isdigit():
            n = float(t[1:-1])
            unit = {"m": "minutes", "h": "hours", "d": "days", "w": "weeks"}[t[-1]]
            when = _dt.datetime.now(_dt.timezone.utc) - _dt.timedelta(**{unit: n})
        else:
            when = _dt.datetime.fromisoformat(t.rstrip("Z"))
            if when.tzinfo is not None:
                when = when.astimezone(_dt.timezone.utc).replace(tzinfo=None)
            when = when.replace(tzinfo=_dt.timezone.utc)
    except ValueError:
        raise ConfigError(None, what, f"not a time: {text!r} (use 2026-05-20, 2026-05-20T14:00 or -8h)") from None
    return when.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def attempt_summary(row: dict) -> dict[str, Any]:
    """A JSON-friendly attempt (reasons decoded)."""
    out = dict(row)
    if isinstance(out.get("reasons"), str):
        try:
            out["reasons"] = json.loads(out["reasons"])
        except ValueError:
            pass
    return out
