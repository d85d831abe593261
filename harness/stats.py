"""Line statistics from the results store: `harness stats`.

Definitions (what every figure means)
-------------------------------------
* A **unit** is a serial number measured against one profile (id and revision).
  Attempts with verdict ``abandoned`` are listed but never judged.
* **First-pass yield** (FPY): units whose first attempt passed / units.
  **Yield** (final): units whose latest attempt passed / units. Both with a 95 %
  Wilson score interval (`scipy.stats.binomtest(...).proportion_ci(method="wilson")`).
  A unit belongs to the lot, station and time window of its first attempt.
* **Capability** per frequency point, over each unit's first valid attempt (pass, fail
  or inconclusive; invalid measurements carry no usable figures), in time order:
  mean and sample standard deviation s of the measured gain; the within-process sigma
  from the average moving range, sigma_w = MR-bar / d2 with d2 = 2 / sqrt(pi) = 1.128
  for ranges of two (the expected range of two standard normal values);
  Cpk = min(USL - mean, mean - LSL) / (3 sigma_w) and Ppk the same with s
  (AIAG SPC manual; ISO 22514-2; one-sided when the mask gives one limit, as in a stop
  band). USL / LSL are the mask limits at that frequency.
* **Drift** (control chart): an individuals chart of the gain at one frequency (default:
  the lowest Cpk) in time order, centre line and limits mean +- 3 sigma_w from the first
  ``baseline`` units (values beyond the trial limits set aside, as in a Phase I study),
  moving-range chart limit D4 MR-bar with D4 = 3.267; signals:
  a point beyond the limits (Western Electric rule 1) and eight points in a row on one
  side of the centre line (Western Electric run rule).

Exports: CSV (one row per attempt), JUnit XML (one test case per unit: the latest
attempt's verdict; fail and inconclusive are failures, invalid an error), PNG plots and
CSV tables (``--report DIR``).
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import json
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from harness.errors import ConfigError

D2_N2 = 2.0 / math.sqrt(math.pi)   # E[range of 2 iid N(0,1)] = 2/sqrt(pi) = 1.1284
D4_N2 = 3.267                      # moving-range chart upper factor for n = 2 (ASTM E2587 table, from memory)
RUN_LENGTH = 8                     # Western Electric run rule: 8 in a row on one side
JUDGED = ("pass", "fail", "inconclusive", "invalid")
GROUPINGS = ("lot", "station", "profile", "hour", "day", "week", "operator", "work_order")

ATTEMPT_COLUMNS = ("id", "uuid", "serial", "attempt_no", "lot", "work_order", "operator", "station_id",
                   "profile_id", "profile_revision", "profile_sha256", "calibration_id", "verdict", "exit_code",
                   "reasons", "worst_margin_db", "worst_frequency_hz", "worst_expanded_gain_db", "n_points",
                   "decision_rule", "confidence", "certificate_id", "certificate_file", "certificate_sha256",
                   "raw_file", "raw_sha256", "signature_fingerprint", "duplicate", "software_version", "host",
                   "started_utc", "finished_utc", "recorded_utc", "session_uuid")


# --------------------------------------------------------------------------------------
# pure statistics (arrays in, numbers out)
# --------------------------------------------------------------------------------------
def wilson_interval(k: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a proportion k/n (scipy.stats.binomtest)."""
    if n <= 0:
        return (math.nan, math.nan)
    from scipy.stats import binomtest

    ci = binomtest(int(k), int(n)).proportion_ci(confidence_level=confidence, method="wilson")
    return (float(ci.low), float(ci.high))


def sigma_within(x) -> float:
    """Within-process standard deviation from the average moving range of consecutive
    values: MR-bar / d2, d2 = 2/sqrt(pi) (ranges of two). NaN for fewer than 2 values."""
    x = np.asarray(x, dtype=float)
    if x.size < 2:
        return math.nan
    return float(np.mean(np.abs(np.diff(x))) / D2_N2)


def cpk(mean: float, sigma: float, lsl: float | None, usl: float | None) -> float:
    """Process capability index min(USL - mean, mean - LSL) / (3 sigma); one-sided when
    one limit is None; NaN without limits or without spread."""
    sides = []
    if usl is not None and math.isfinite(usl):
        sides.append(usl - mean)
    if lsl is not None and math.isfinite(lsl):
        sides.append(mean - lsl)
    if not sides or not (sigma > 0) or not math.isfinite(sigma):
        return math.nan
    return float(min(sides) / (3.0 * sigma))


@dataclass
class Capability:
    """Capability of the gain at one frequency point."""

    frequency_hz: float
    n: int
    mean_db: float
    std_db: float
    sigma_within_db: float
    lsl_db: float | None
    usl_db: float | None
    cpk: float
    ppk: float
    outside: int                   # values beyond a limit (measured value, no uncertainty)

    def to_dict(self) -> dict:
        return {k: _clean(v) for k, v in self.__dict__.items()}


def capability(freq_hz: float, gain_db, lsl: float | None, usl: float | None) -> Capability:
    """Mean, s, sigma_within, Cpk, Ppk of `gain_db` (time order) against the limits."""
    g = np.asarray(gain_db, dtype=float)
    g = g[np.isfinite(g)]
    n = int(g.size)
    mean = float(np.mean(g)) if n else math.nan
    s = float(np.std(g, ddof=1)) if n >= 2 else math.nan
    sw = sigma_within(g)
    out = 0
    if usl is not None:
        out += int(np.sum(g > usl))
    if lsl is not None:
        out += int(np.sum(g < lsl))
    return Capability(float(freq_hz), n, mean, s, sw, lsl, usl, cpk(mean, sw, lsl, usl), cpk(mean, s, lsl, usl), out)


@dataclass
class ControlChart:
    """Individuals and moving-range chart of one series."""

    frequency_hz: float | None
    values: np.ndarray
    times: list
    serials: list
    baseline: int
    centre: float
    sigma: float
    ucl: float
    lcl: float
    mr_bar: float
    mr_ucl: float
    beyond: list = field(default_factory=list)       # indices beyond the limits
    runs: list = field(default_factory=list)         # indices ending a run of RUN_LENGTH on one side

    def to_dict(self) -> dict:
        return {"frequency_hz": self.frequency_hz, "n": int(self.values.size), "baseline": self.baseline,
                "centre_db": _clean(self.centre), "sigma_within_db": _clean(self.sigma), "ucl_db": _clean(self.ucl),
                "lcl_db": _clean(self.lcl), "mr_bar_db": _clean(self.mr_bar), "mr_ucl_db": _clean(self.mr_ucl),
                "beyond_limits": [{"index": i, "serial": self.serials[i], "utc": self.times[i],
                                   "gain_db": _clean(self.values[i])} for i in self.beyond],
                "runs": [{"index": i, "serial": self.serials[i], "utc": self.times[i]} for i in self.runs]}


def control_chart(values, *, baseline: int = 25, times=None, serials=None, frequency_hz=None) -> ControlChart:
    """Individuals (I-MR) chart: limits from the first `baseline` values, signals over all.

    The baseline is cleaned as in a Phase I study (Montgomery, Introduction to
    Statistical Quality Control, ch. 6): values beyond the trial limits are set aside
    and the limits recomputed, until none is left beyond them; moving ranges that
    involve a set-aside value are not used.
    """
    x = np.asarray(values, dtype=float)
    nb = int(min(max(baseline, 2), x.size))
    keep = np.ones(nb, dtype=bool)
    centre = sigma = mr_bar = math.nan
    for _ in range(10):
        base = x[:nb][keep]
        pair_ok = keep[1:] & keep[:-1]
        mr = np.abs(np.diff(x[:nb]))[pair_ok]
        if base.size < 2 or mr.size < 1:
            break
        centre = float(np.mean(base))
        mr_bar = float(np.mean(mr))
        sigma = mr_bar / D2_N2
        out = keep & (np.abs(x[:nb] - centre) > 3 * sigma)
        if not out.any():
            break
        keep &= ~out
    ucl, lcl = centre + 3 * sigma, centre - 3 * sigma
    beyond = [int(i) for i in np.flatnonzero((x > ucl) | (x < lcl))] if math.isfinite(sigma) else []
    runs = []
    side = np.sign(x - centre)
    count, prev = 0, 0.0
    for i, sgn in enumerate(side):
        count = count + 1 if (sgn != 0 and sgn == prev) else (1 if sgn != 0 else 0)
        prev = sgn
        if count == RUN_LENGTH:
            runs.append(i)
    return ControlChart(frequency_hz, x, list(times or [None] * x.size), list(serials or [None] * x.size), nb,
                        centre, sigma, ucl, lcl, mr_bar, D4_N2 * mr_bar, beyond, runs)


def _clean(v):
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if math.isfinite(v) else None
    if isinstance(v, np.integer):
        return int(v)
    return v


# --------------------------------------------------------------------------------------
# from the store
# --------------------------------------------------------------------------------------
@dataclass
class Unit:
    """A serial number against one profile, with its attempts (oldest first);
    ``judged`` leaves out abandoned attempts."""

    serial: str
    profile: str
    attempts: list
    judged: list = field(default_factory=list)

    def __post_init__(self):
        if not self.judged:
            self.judged = [a for a in self.attempts if a["verdict"] in JUDGED]

    @property
    def first(self) -> dict:
        return self.judged[0]

    @property
    def last(self) -> dict:
        return self.judged[-1]


def profile_key(a: dict) -> str:
    return f"{a['profile_id']} rev {a.get('profile_revision') or '-'}"


def build_units(attempts: list[dict]) -> list[Unit]:
    """Units (serial x profile) from attempts in time order; units with no judged
    attempt (only abandoned ones) are left out."""
    by = {}
    for a in attempts:
        by.setdefault((a["serial"], profile_key(a)), []).append(a)
    units = [Unit(s, p, atts) for (s, p), atts in by.items()]
    return [u for u in units if u.judged]


def _week(utc: str) -> str:
    d = _dt.date.fromisoformat(utc[:10])
    y, w, _ = d.isocalendar()
    return f"{y}-W{w:02d}"


def group_key(a: dict, by: str) -> str:
    if by == "lot":
        return a.get("lot") or "-"
    if by == "station":
        return a.get("station_id") or "-"
    if by == "profile":
        return profile_key(a)
    if by == "operator":
        return a.get("operator") or "-"
    if by == "work_order":
        return a.get("work_order") or "-"
    t = a["finished_utc"]
    if by == "hour":
        return t[:13] + ":00Z"
    if by == "day":
        return t[:10]
    if by == "week":
        return _week(t)
    raise ConfigError(None, "--by", f"unknown grouping {by!r}; expected one of: {', '.join(GROUPINGS)}")


def yield_table(units: list[Unit], by: str | None) -> list[dict]:
    """Yield and first-pass yield per group (a unit counts in its first attempt's group);
    with `by` None a single row for all units."""
    groups: dict[str, list[Unit]] = {}
    for u in units:
        groups.setdefault("all" if by is None else group_key(u.first, by), []).append(u)
    rows = []
    for g in sorted(groups):
        us = groups[g]
        n = len(us)
        fp = sum(1 for u in us if u.first["verdict"] == "pass")
        fin = sum(1 for u in us if u.last["verdict"] == "pass")
        att = sum(len(u.judged) for u in us)
        lo, hi = wilson_interval(fin, n)
        flo, fhi = wilson_interval(fp, n)
        rows.append({"group": g, "units": n, "attempts": att, "retests": att - n, "first_pass": fp, "passed": fin,
                     "failed": sum(1 for u in us if u.last["verdict"] == "fail"),
                     "inconclusive": sum(1 for u in us if u.last["verdict"] == "inconclusive"),
                     "invalid": sum(1 for u in us if u.last["verdict"] == "invalid"),
                     "first_pass_yield": fp / n, "first_pass_yield_ci95": [flo, fhi],
                     "yield": fin / n, "yield_ci95": [lo, hi]})
    return rows


@dataclass
class ProfileCapability:
    profile: str
    units: int
    points: list            # Capability per frequency
    series: dict            # frequency -> (gains in time order, times, serials)


def _first_valid_attempts(store, filters: dict):
    """SQL (SQLAlchemy Core CTE): each unit's first valid attempt (pass, fail or
    inconclusive) among the attempts matching `filters`, with the previous such attempt
    of the same profile in time order (``prev_id``, for moving ranges) and the profile's
    first one (``ref_id``, whose gains shift the sums of squares)."""
    from sqlalchemy import func, select

    from harness.store import _filtered

    a = store.tables["attempts"]
    rev = func.coalesce(a.c.profile_revision, "")
    ranked = select(a.c.id, a.c.serial, a.c.profile_id, rev.label("rev"), a.c.finished_utc,
                    func.row_number().over(partition_by=(a.c.serial, a.c.profile_id, rev),
                                           order_by=(a.c.finished_utc, a.c.id)).label("rn")
                    ).where(a.c.verdict.in_(("pass", "fail", "inconclusive")))
    ranked = _filtered(ranked, a, **filters).cte("ranked")
    f0 = select(ranked.c.id, ranked.c.serial, ranked.c.profile_id, ranked.c.rev,
                ranked.c.finished_utc).where(ranked.c.rn == 1).cte("firsts0")
    win = {"partition_by": (f0.c.profile_id, f0.c.rev), "order_by": (f0.c.finished_utc, f0.c.id)}
    return select(f0, func.lag(f0.c.id).over(**win).label("prev_id"),
                  func.first_value(f0.c.id).over(**win).label("ref_id")).cte("firsts")


def capability_tables(store, units: list[Unit], filters: dict, *, series_count: int = 6,
                      frequency_hz: float | None = None) -> list[ProfileCapability]:
    """Per profile: the capability of every frequency point over each unit's first
    valid attempt (pass, fail or inconclusive), in time order.

    Everything is summed inside the database in one pass (SQLite >= 3.25 and PostgreSQL
    have the window functions it needs), so 100,000 units are summarised without moving
    millions of rows to Python: count, the sums of ``g - c`` and ``(g - c)**2`` with
    ``c`` the gain of the profile's first unit at that point (a shift that keeps the
    variance accurate; unshifted sums are the fallback when a point has no such
    reference), and the sum of moving ranges ``|g - g_previous unit|``. The values
    themselves are fetched only for the `series_count` points with the lowest Cpk and
    for `frequency_hz` (histograms and the control chart).
    """
    from sqlalchemy import and_, case, func, select

    firsts = _first_valid_attempts(store, filters)
    p = store.tables["points"]
    q, r = p.alias("q"), p.alias("r")
    d = p.c.gain_db - r.c.gain_db
    query = (select(firsts.c.profile_id, firsts.c.rev, p.c.frequency_hz, func.count(), func.sum(d), func.sum(d * d),
                    func.count(r.c.gain_db), func.sum(p.c.gain_db), func.sum(p.c.gain_db * p.c.gain_db),
                    func.min(r.c.gain_db), func.max(r.c.gain_db),
                    func.sum(func.abs(p.c.gain_db - q.c.gain_db)), func.count(q.c.gain_db),
                    func.min(p.c.limit_low_db), func.max(p.c.limit_high_db),
                    func.sum(case((p.c.gain_db > p.c.limit_high_db, 1), else_=0))
                    + func.sum(case((p.c.gain_db < p.c.limit_low_db, 1), else_=0)))
             .select_from(firsts.join(p, p.c.attempt_id == firsts.c.id)
                          .outerjoin(q, and_(q.c.attempt_id == firsts.c.prev_id, q.c.idx == p.c.idx,
                                             q.c.frequency_hz == p.c.frequency_hz))
                          .outerjoin(r, and_(r.c.attempt_id == firsts.c.ref_id, r.c.idx == p.c.idx,
                                             r.c.frequency_hz == p.c.frequency_hz)))
             .where(p.c.gain_db.is_not(None))
             .group_by(firsts.c.profile_id, firsts.c.rev, p.c.frequency_hz)
             .order_by(firsts.c.profile_id, firsts.c.rev, p.c.frequency_hz))
    with store.engine.connect() as conn:
        rows = conn.execute(query).all()
    per_profile: dict[tuple, list[Capability]] = {}
    for pid, rev, f, n, s1, s2, n_ref, raw1, raw2, c_lo, c_hi, mr_sum, mr_n, lo, hi, out in rows:
        n = int(n)
        if int(n_ref) == n and c_lo == c_hi:          # one shift for the whole group
            c = float(c_lo)
            mean = c + float(s1) / n
            ss = float(s2) - float(s1) ** 2 / n
        else:                                         # no common reference: unshifted sums
            mean = float(raw1) / n
            ss = float(raw2) - float(raw1) ** 2 / n
        s = math.sqrt(max(ss, 0.0) / (n - 1)) if n >= 2 else math.nan
        sw = (float(mr_sum) / int(mr_n)) / D2_N2 if mr_n else math.nan
        lo = None if lo is None else float(lo)
        hi = None if hi is None else float(hi)
        per_profile.setdefault((pid, rev), []).append(
            Capability(float(f), n, mean, s, sw, lo, hi, cpk(mean, sw, lo, hi), cpk(mean, s, lo, hi), int(out or 0)))
    n_units: dict[str, int] = {}
    for u in units:
        if any(a["verdict"] in ("pass", "fail", "inconclusive") for a in u.judged):
            n_units[u.profile] = n_units.get(u.profile, 0) + 1
    out_list = []
    for (pid, rev), caps in per_profile.items():
        name = f"{pid} rev {rev or '-'}"
        out_list.append(ProfileCapability(name, n_units.get(name, 0), caps, {}))
    # the values of the few points that are plotted / charted
    wanted = set()
    for pc in out_list:
        ranked = sorted([c for c in pc.points if c.cpk is not None and math.isfinite(c.cpk)], key=lambda c: c.cpk)
        wanted |= {c.frequency_hz for c in ranked[:series_count]}
        if frequency_hz is not None and pc.points:
            fs = np.array([c.frequency_hz for c in pc.points])
            wanted.add(float(fs[np.argmin(np.abs(fs - frequency_hz))]))
    if wanted:
        firsts = _first_valid_attempts(store, filters)
        query = (select(firsts.c.profile_id, firsts.c.rev, p.c.frequency_hz, p.c.gain_db, firsts.c.finished_utc,
                        firsts.c.serial)
                 .select_from(firsts.join(p, p.c.attempt_id == firsts.c.id))
                 .where(p.c.gain_db.is_not(None), p.c.frequency_hz.in_(sorted(wanted)))
                 .order_by(firsts.c.finished_utc, firsts.c.id))
        by_name = {pc.profile: pc for pc in out_list}
        with store.engine.connect() as conn:
            for pid, rev, f, g, t, serial in conn.execute(query):
                pc = by_name[f"{pid} rev {rev or '-'}"]
                ser = pc.series.setdefault(float(f), ([], [], []))
                ser[0].append(float(g))
                ser[1].append(t)
                ser[2].append(serial)
    return sorted(out_list, key=lambda pc: pc.profile)


def worst_cpk(pc: ProfileCapability) -> Capability | None:
    judged = [c for c in pc.points if c.cpk is not None and math.isfinite(c.cpk)]
    return min(judged, key=lambda c: c.cpk) if judged else None


# --------------------------------------------------------------------------------------
# exports
# --------------------------------------------------------------------------------------
def attempts_csv(attempts: list[dict]) -> str:
    """CSV text, one row per attempt (every stored column except internal ids)."""
    buf = io.StringIO()
    cols = [c for c in ATTEMPT_COLUMNS if c != "id"]
    w = csv.DictWriter(buf, fieldnames=cols, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for a in attempts:
        w.writerow({c: a.get(c) for c in cols})
    return buf.getvalue()


def _seconds(a: dict) -> float:
    try:
        t0 = _dt.datetime.fromisoformat(a["started_utc"].rstrip("Z"))
        t1 = _dt.datetime.fromisoformat(a["finished_utc"].rstrip("Z"))
        return max((t1 - t0).total_seconds(), 0.0)
    except (KeyError, TypeError, ValueError, AttributeError):
        return 0.0


def junit_xml(units: list[Unit], *, name: str = "harness line") -> bytes:
    """JUnit XML: a test suite per (profile, lot), a test case per unit named by its
    serial; the latest attempt's verdict decides: fail / inconclusive -> <failure>,
    invalid -> <error>; every attempt is listed in <system-out> and as properties."""
    import socket
    import xml.etree.ElementTree as ET

    suites: dict[tuple, list[Unit]] = {}
    for u in units:
        suites.setdefault((u.profile, u.first.get("lot") or "-"), []).append(u)
    root = ET.Element("testsuites", name=name)
    tot = {"tests": 0, "failures": 0, "errors": 0, "time": 0.0}
    for (prof, lot), us in sorted(suites.items()):
        fails = sum(1 for u in us if u.last["verdict"] in ("fail", "inconclusive"))
        errs = sum(1 for u in us if u.last["verdict"] == "invalid")
        t = sum(_seconds(a) for u in us for a in u.judged)
        first_time = min(u.first["finished_utc"] for u in us)
        suite = ET.SubElement(root, "testsuite", name=f"{prof} / lot {lot}", tests=str(len(us)),
                              failures=str(fails), errors=str(errs), skipped="0", time=f"{t:.3f}",
                              timestamp=first_time[:19], hostname=socket.gethostname())
        props = ET.SubElement(suite, "properties")
        ET.SubElement(props, "property", name="profile", value=prof)
        ET.SubElement(props, "property", name="lot", value=lot)
        for u in sorted(us, key=lambda u: (u.first["finished_utc"], u.serial)):
            last = u.last
            tc = ET.SubElement(suite, "testcase", classname=f"{prof.split(' rev ')[0]}.{lot}", name=u.serial,
                               time=f"{sum(_seconds(a) for a in u.judged):.3f}")
            tp = ET.SubElement(tc, "properties")
            for k, v in (("harness_verdict", last["verdict"]), ("harness_attempts", len(u.judged)),
                         ("harness_first_verdict", u.first["verdict"]),
                         ("harness_worst_margin_db", last.get("worst_margin_db")),
                         ("harness_worst_frequency_hz", last.get("worst_frequency_hz")),
                         ("harness_station", last.get("station_id")), ("harness_operator", last.get("operator")),
                         ("harness_certificate", last.get("certificate_file")),
                         ("harness_certificate_sha256", last.get("certificate_sha256"))):
                ET.SubElement(tp, "property", name=k, value="" if v is None else str(v))
            reasons = _reasons(last)
            w = last.get("worst_margin_db")
            msg = (f"{last['verdict'].upper()}: worst margin {w:+.3f} dB at {last.get('worst_frequency_hz'):.6g} Hz"
                   if w is not None and last.get("worst_frequency_hz") is not None else last["verdict"].upper())
            if last["verdict"] in ("fail", "inconclusive"):
                ET.SubElement(tc, "failure", message=msg, type=last["verdict"]).text = "\n".join(reasons)
            elif last["verdict"] == "invalid":
                ET.SubElement(tc, "error", message=msg, type="invalid").text = "\n".join(reasons)
            ET.SubElement(tc, "system-out").text = "\n".join(
                f"attempt {a['attempt_no']}: {a['verdict']} at {a['finished_utc']} on {a.get('station_id')}, "
                f"certificate {a.get('certificate_file')}" for a in u.attempts)
        tot["tests"] += len(us)
        tot["failures"] += fails
        tot["errors"] += errs
        tot["time"] += t
    root.set("tests", str(tot["tests"]))
    root.set("failures", str(tot["failures"]))
    root.set("errors", str(tot["errors"]))
    root.set("time", f"{tot['time']:.3f}")
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)


def _reasons(a: dict) -> list[str]:
    r = a.get("reasons")
    if isinstance(r, str):
        try:
            r = json.loads(r)
        except ValueError:
            r = [r]
    return [str(x) for x in (r or [])]


def capability_csv(caps: list[ProfileCapability]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["profile", "frequency_hz", "n", "mean_db", "std_db", "sigma_within_db", "lsl_db", "usl_db", "cpk",
                "ppk", "outside"])
    for pc in caps:
        for c in pc.points:
            d = c.to_dict()
            w.writerow([pc.profile] + [d[k] for k in ("frequency_hz", "n", "mean_db", "std_db", "sigma_within_db",
                                                      "lsl_db", "usl_db", "cpk", "ppk", "outside")])
    return buf.getvalue()


def yield_csv(rows: list[dict], by: str | None) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([by or "group", "units", "attempts", "retests", "first_pass", "passed", "first_pass_yield",
                "fpy_ci95_low", "fpy_ci95_high", "yield", "yield_ci95_low", "yield_ci95_high"])
    for r in rows:
        w.writerow([r["group"], r["units"], r["attempts"], r["retests"], r["first_pass"], r["passed"],
                    r["first_pass_yield"], *r["first_pass_yield_ci95"], r["yield"], *r["yield_ci95"]])
    return buf.getvalue()


# --------------------------------------------------------------------------------------
# plots
# --------------------------------------------------------------------------------------
def plot_capability(pc: ProfileCapability, path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    f = np.array([c.frequency_hz for c in pc.points])
    mean = np.array([c.mean_db if c.mean_db is not None else np.nan for c in pc.points], dtype=float)
    s = np.array([c.std_db if c.std_db is not None else np.nan for c in pc.points], dtype=float)
    lsl = np.array([np.nan if c.lsl_db is None else c.lsl_db for c in pc.points])
    usl = np.array([np.nan if c.usl_db is None else c.usl_db for c in pc.points])
    ck = np.array([np.nan if c.cpk is None else c.cpk for c in pc.points], dtype=float)
    pk = np.array([np.nan if c.ppk is None else c.ppk for c in pc.points], dtype=float)
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(9, 7), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    a1.errorbar(f, mean, yerr=3 * s, fmt="o", ms=3, capsize=2, color="#1f4e99", label="mean ± 3 s")
    a1.plot(f, usl, "v", color="#b22222", ms=5, label="upper limit")
    a1.plot(f, lsl, "^", color="#b22222", ms=5, label="lower limit")
    a1.set_xscale("log")
    a1.set_ylabel("gain (dB)")
    a1.set_title(f"{pc.profile}: measured gain over {pc.units} units (first valid attempt)")
    a1.grid(True, which="both", alpha=0.3)
    a1.legend(fontsize=8)
    a2.semilogx(f, ck, "o-", ms=4, label="Cpk (within, MR/d2)")
    a2.semilogx(f, pk, "s--", ms=3, label="Ppk (overall s)")
    a2.axhline(1.33, color="green", lw=0.8, ls=":", label="1.33")
    a2.axhline(1.0, color="red", lw=0.8, ls=":", label="1.00")
    finite = np.concatenate([ck[np.isfinite(ck)], pk[np.isfinite(pk)]])
    if finite.size:
        a2.set_ylim(min(0.0, float(finite.min()) - 0.2), min(max(2.5, float(np.median(finite)) * 1.2), 50.0))
    a2.set_xlabel("frequency (Hz)")
    a2.set_ylabel("capability index")
    a2.grid(True, which="both", alpha=0.3)
    a2.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_control(cc: ControlChart, title: str, path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    x = cc.values
    i = np.arange(1, x.size + 1)
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(9, 6), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    a1.plot(i, x, "o-", ms=3, lw=0.8, color="#1f4e99")
    for y, ls in ((cc.centre, "-"), (cc.ucl, "--"), (cc.lcl, "--")):
        a1.axhline(y, color="#444", lw=0.9, ls=ls)
    if cc.beyond:
        a1.plot(i[cc.beyond], x[cc.beyond], "o", color="red", ms=7, mfc="none", label="beyond 3 sigma")
    if cc.runs:
        a1.plot(i[cc.runs], x[cc.runs], "s", color="orange", ms=7, mfc="none", label=f"run of {RUN_LENGTH}")
    a1.axvspan(0.5, cc.baseline + 0.5, color="#ddd", alpha=0.5, label="baseline")
    a1.set_ylabel("gain (dB)")
    a1.set_title(title)
    a1.legend(fontsize=8)
    a1.grid(True, alpha=0.3)
    mr = np.abs(np.diff(x))
    a2.plot(i[1:], mr, "o-", ms=3, lw=0.8, color="#555")
    a2.axhline(cc.mr_bar, color="#444", lw=0.9)
    a2.axhline(cc.mr_ucl, color="#444", lw=0.9, ls="--")
    a2.set_ylabel("moving range (dB)")
    a2.set_xlabel("unit (time order)")
    a2.grid(True, alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_histograms(pc: ProfileCapability, path: Path, count: int = 6) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    judged = sorted([c for c in pc.points if c.cpk is not None and math.isfinite(c.cpk) and c.frequency_hz in pc.series],
                    key=lambda c: c.cpk)[:count]
    n = max(len(judged), 1)
    cols = min(3, n)
    rows = int(math.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(4 * cols, 3 * rows), squeeze=False)
    for ax, c in zip(axes.flat, judged):
        g = np.asarray(pc.series[c.frequency_hz][0], dtype=float)
        ax.hist(g, bins=max(5, min(40, int(np.sqrt(g.size)) * 2)), color="#8fb3e0", edgecolor="#1f4e99")
        for lim in (c.lsl_db, c.usl_db):
            if lim is not None:
                ax.axvline(lim, color="red", lw=1.2)
        ax.set_title(f"{c.frequency_hz:.6g} Hz: Cpk {c.cpk:.2f}, n {c.n}", fontsize=9)
        ax.set_xlabel("gain (dB)", fontsize=8)
        ax.tick_params(labelsize=7)
    for ax in list(axes.flat)[len(judged):]:
        ax.axis("off")
    fig.suptitle(f"{pc.profile}: the points with the lowest Cpk (red: mask limits)", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_yield(rows: list[dict], by: str | None, path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(max(6, 0.5 * len(rows) + 3), 4))
    x = np.arange(len(rows))
    y = np.array([r["yield"] for r in rows]) * 100
    f = np.array([r["first_pass_yield"] for r in rows]) * 100
    ax.bar(x - 0.2, f, 0.4, label="first-pass yield", color="#8fb3e0")
    ax.bar(x + 0.2, y, 0.4, label="yield", color="#1f4e99")
    ax.set_xticks(x, [r["group"] for r in rows], rotation=45 if len(rows) > 4 else 0, ha="right", fontsize=8)
    ax.set_ylabel("%")
    ax.set_ylim(0, 105)
    ax.set_title(f"yield by {by or 'all'}")
    ax.legend(fontsize=8)
    ax.grid(True, axis="y", alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


# --------------------------------------------------------------------------------------
# the verb
# --------------------------------------------------------------------------------------
@dataclass
class StatsReport:
    filters: dict
    units: list
    attempts: list
    yields: list
    by: str | None
    capabilities: list
    chart: ControlChart | None
    chart_profile: str | None
    seconds: float = 0.0

    def to_dict(self) -> dict:
        return {"filters": self.filters, "units": len(self.units), "attempts": len(self.attempts),
                "abandoned": sum(1 for a in self.attempts if a["verdict"] == "abandoned"),
                "by": self.by, "yield": self.yields,
                "overall": yield_table(self.units, None)[0] if self.units else None,
                "capability": [{"profile": pc.profile, "units": pc.units,
                                "points": [c.to_dict() for c in pc.points]} for pc in self.capabilities],
                "control_chart": None if self.chart is None else {"profile": self.chart_profile,
                                                                   **self.chart.to_dict()},
                "seconds": self.seconds}


def compute(store, *, profile_id=None, lot=None, station_id=None, since_utc=None, until_utc=None,
            by: str | None = None, frequency_hz: float | None = None, baseline: int = 25) -> StatsReport:
    """Every figure of `harness stats` from an open store."""
    import time

    t0 = time.perf_counter()
    filters = {"profile_id": profile_id, "lot": lot, "station_id": station_id, "since_utc": since_utc,
               "until_utc": until_utc}
    attempts = store.attempts(**filters, columns=ATTEMPT_COLUMNS)
    units = build_units(attempts)
    if by is not None and by not in GROUPINGS:
        raise ConfigError(None, "--by", f"unknown grouping {by!r}; expected one of: {', '.join(GROUPINGS)}")
    yields = yield_table(units, by) if units else []
    caps = capability_tables(store, units, filters, frequency_hz=frequency_hz) if units else []
    chart, chart_prof = None, None
    if caps:
        pc = caps[0] if len(caps) == 1 else max(caps, key=lambda p: p.units)
        if frequency_hz is not None:
            keys = np.array([c.frequency_hz for c in pc.points])
            f = float(keys[np.argmin(np.abs(keys - frequency_hz))])
        else:
            w = worst_cpk(pc)
            f = w.frequency_hz if w else None
        if f is not None and f in pc.series and len(pc.series[f][0]) >= 2:
            g, t, s = pc.series[f]
            chart = control_chart(g, baseline=baseline, times=t, serials=s, frequency_hz=f)
            chart_prof = pc.profile
    return StatsReport(filters, units, attempts, yields, by, caps, chart, chart_prof, time.perf_counter() - t0)


def _f(v, spec=".3f", none="-"):
    return none if v is None or (isinstance(v, float) and not math.isfinite(v)) else format(v, spec)


def format_report(rep: StatsReport, *, max_points: int = 40) -> str:
    """The human-readable tables."""
    L = []
    flt = ", ".join(f"{k.replace('_utc', '')} {v}" for k, v in rep.filters.items() if v) or "none"
    ab = sum(1 for a in rep.attempts if a["verdict"] == "abandoned")
    L.append(f"harness stats: {len(rep.units)} units, {len(rep.attempts)} attempts"
             + (f" ({ab} abandoned)" if ab else "") + f"; filters: {flt}")
    if not rep.units:
        L.append("no measured units match")
        return "\n".join(L)
    allrow = yield_table(rep.units, None)[0]
    L.append(f"yield {100 * allrow['yield']:.1f} % (95 % CI {100 * allrow['yield_ci95'][0]:.1f}..."
             f"{100 * allrow['yield_ci95'][1]:.1f} %), first-pass yield {100 * allrow['first_pass_yield']:.1f} % "
             f"({100 * allrow['first_pass_yield_ci95'][0]:.1f}...{100 * allrow['first_pass_yield_ci95'][1]:.1f} %), "
             f"{allrow['retests']} retests")
    L.append("")
    L.append(f"yield by {rep.by or 'all'} (a unit counts where its first attempt was)")
    L.append(f"  {'group':<26} {'units':>6} {'attempts':>8} {'FPY %':>7} {'yield %':>8} {'fail':>5} "
             f"{'inconcl':>7} {'invalid':>7}")
    for r in rep.yields:
        L.append(f"  {str(r['group'])[:26]:<26} {r['units']:>6} {r['attempts']:>8} {100 * r['first_pass_yield']:>7.1f} "
                 f"{100 * r['yield']:>8.1f} {r['failed']:>5} {r['inconclusive']:>7} {r['invalid']:>7}")
    for pc in rep.capabilities:
        L.append("")
        L.append(f"capability: {pc.profile}, {pc.units} units (first valid attempt), gain in dB")
        L.append(f"  {'freq Hz':>10} {'n':>6} {'mean':>8} {'s':>7} {'s_within':>8} {'LSL':>8} {'USL':>8} "
                 f"{'Cpk':>7} {'Ppk':>7} {'out':>4}")
        pts = pc.points
        if len(pts) > max_points:
            keep = {c.frequency_hz for c in sorted([c for c in pts if c.cpk is not None and math.isfinite(c.cpk)],
                                                   key=lambda c: c.cpk)[:max_points]}
            pts = [c for c in pts if c.frequency_hz in keep]
            L.append(f"  (the {max_points} points with the lowest Cpk of {len(pc.points)})")
        for c in pts:
            L.append(f"  {c.frequency_hz:>10.6g} {c.n:>6} {_f(c.mean_db, '+.3f'):>8} {_f(c.std_db, '.4f'):>7} "
                     f"{_f(c.sigma_within_db, '.4f'):>8} {_f(c.lsl_db, '+.3f'):>8} {_f(c.usl_db, '+.3f'):>8} "
                     f"{_f(c.cpk, '.2f'):>7} {_f(c.ppk, '.2f'):>7} {c.outside:>4}")
        w = worst_cpk(pc)
        if w:
            L.append(f"  lowest Cpk {w.cpk:.2f} at {w.frequency_hz:.6g} Hz"
                     + ("  (below 1.33: watch this point)" if w.cpk < 1.33 else ""))
    if rep.chart is not None:
        c = rep.chart
        L.append("")
        L.append(f"drift: individuals chart of the gain at {c.frequency_hz:.6g} Hz ({rep.chart_profile}), "
                 f"{c.values.size} units, limits from the first {c.baseline}")
        L.append(f"  centre {c.centre:+.4f} dB, limits {c.lcl:+.4f} .. {c.ucl:+.4f} dB (3 sigma_within "
                 f"{3 * c.sigma:.4f} dB), moving range mean {c.mr_bar:.4f} dB, limit {c.mr_ucl:.4f} dB")
        if not c.beyond and not c.runs:
            L.append("  in control: no point beyond the limits, no run of "
                     f"{RUN_LENGTH} on one side")
        for i in c.beyond[:10]:
            L.append(f"  OUT OF CONTROL: unit {i + 1} ({c.serials[i]}, {c.times[i]}) at {c.values[i]:+.4f} dB")
        for i in c.runs[:10]:
            L.append(f"  DRIFT: {RUN_LENGTH} units in a row on one side of the centre, ending at unit {i + 1} "
                     f"({c.serials[i]}, {c.times[i]})")
    L.append("")
    L.append(f"({rep.seconds:.2f} s)")
    return "\n".join(L)


def write_report(rep: StatsReport, folder: Path) -> list[Path]:
    """Tables (CSV), JUnit XML and plots (PNG) into `folder`."""
    from harness.certificate import write_unique

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")

    def put(name, ext, data: bytes):
        paths.append(write_unique(folder, f"{name}_{stamp}", ext, data))

    put("attempts", ".csv", attempts_csv(rep.attempts).encode("utf-8"))
    put(f"yield-by-{rep.by or 'all'}", ".csv", yield_csv(rep.yields, rep.by).encode("utf-8"))
    put("capability", ".csv", capability_csv(rep.capabilities).encode("utf-8"))
    put("units", ".junit.xml", junit_xml(rep.units))
    put("stats", ".json", json.dumps(rep.to_dict(), indent=1, sort_keys=True, default=str).encode("utf-8"))
    import tempfile

    with tempfile.TemporaryDirectory(dir=folder) as tmp:
        tmp = Path(tmp)
        pngs = []
        if rep.yields:
            pngs.append(("yield", plot_yield(rep.yields, rep.by, tmp / "y.png")))
        for k, pc in enumerate(rep.capabilities):
            tag = "" if len(rep.capabilities) == 1 else f"-{k + 1}"
            pngs.append((f"capability{tag}", plot_capability(pc, tmp / f"c{k}.png")))
            pngs.append((f"histograms{tag}", plot_histograms(pc, tmp / f"h{k}.png")))
        if rep.chart is not None:
            pngs.append(("control-chart", plot_control(
                rep.chart, f"{rep.chart_profile}: gain at {rep.chart.frequency_hz:.6g} Hz (I-MR chart)",
                tmp / "cc.png")))
        for name, p in pngs:
            put(name, ".png", p.read_bytes())
    return paths


def run_stats(url: str, *, out=sys.stdout, profile_id=None, lot=None, station_id=None, since=None, until=None,
              by=None, frequency_hz=None, baseline=25, csv_path=None, junit_path=None, report_dir=None,
              as_json=False) -> int:
    """`harness stats`: print the tables (or JSON), write the requested exports."""
    from harness.store import open_store, parse_time

    since_utc = parse_time(since, "--since") if since else None
    until_utc = parse_time(until, "--until") if until else None
    with open_store(url, readonly=True) as store:
        rep = compute(store, profile_id=profile_id, lot=lot, station_id=station_id, since_utc=since_utc,
                      until_utc=until_utc, by=by, frequency_hz=frequency_hz, baseline=baseline)
    written = []
    if csv_path:
        written.append(_write_export(Path(csv_path), attempts_csv(rep.attempts).encode("utf-8")))
    if junit_path:
        written.append(_write_export(Path(junit_path), junit_xml(rep.units)))
    if report_dir:
        written += write_report(rep, Path(report_dir))
    if as_json:
        doc = rep.to_dict()
        doc["written"] = [str(p) for p in written]
        print(json.dumps(doc, indent=1, sort_keys=True, default=str), file=out)
    else:
        print(format_report(rep), file=out)
        for p in written:
            print(f"written: {p}", file=out)
    return 0


def _write_export(path: Path, data: bytes) -> Path:
    """Exports are replaced atomically when the file exists (they are views of the
    store, which keeps the records themselves)."""
    import os
    import tempfile

    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=path.parent)
    with os.fdopen(fd, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    return path
