"""Golden-unit check: a shift starts with a verified station.

A golden unit is a reference board kept with the station. When the station is known
good (just calibrated, or checked against another station) the golden unit is measured
and its response stored from that certificate::

    harness golden store CERT.json --out golden-KX2-G1.json --tolerance-db 0.05 --tolerance-deg 1

At the start of each shift the golden unit is measured again with the stored response
beside it::

    harness run PROFILE --station STATION --serial KX2-G1 --golden golden-KX2-G1.json

Every point that both measurements measured well (signal-to-noise ratio at least
``min_snr_db`` in both) is compared: today's gain minus the stored gain, and (when a
phase tolerance is stated and today's phase was assessed) today's full phase (every delay
included: with a reference channel that is the board's own) minus the stored one, wrapped
to +-180 deg; the phase "with the bulk delay removed" of a certificate is not used, because
the fitted delay differs a little from run to run. The station is verified when every difference is within the
stated tolerance. The comparison is part of the certificate (``golden_check``); a station
that is not verified makes the result ``invalid`` (exit 4) with the reason, because
nothing measured on it can be trusted.

Golden file (JSON, written once, never overwritten)::

    {"schema": 1, "kind": "harness-golden-unit", "serial": "...",
     "profile": {"id": "...", "revision": "...", "sha256": "..."},
     "station_id": "...", "created_utc": "...", "source_certificate": {"id", "file", "sha256"},
     "tolerance": {"gain_db": 0.05, "phase_deg": 1.0}, "min_snr_db": 40.0,
     "points": [{"frequency_hz", "gain_db", "phase_deg", "U_gain_db", "U_phase_deg", "snr_db"}, ...]}

``phase_deg`` of a golden point is the full phase (the certificate's phase with its
``response.delay_s`` put back).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from harness.errors import ConfigError

SCHEMA = 1
KIND = "harness-golden-unit"
DEFAULT_MIN_SNR_DB = 40.0
FREQ_MATCH_REL = 1e-6


@dataclass(frozen=True)
class GoldenUnit:
    """A stored golden-unit response (see the module docstring).

    Arrays are per point: ``freq_hz`` (Hz), ``gain_db`` (as judged: relative to the
    profile's reference frequency when it has one), ``phase_deg`` (full phase, every delay
    included; NaN when not stored), ``U_gain_db``, ``snr_db``.
    """

    serial: str
    profile_id: str
    profile_revision: str | None
    freq_hz: np.ndarray
    gain_db: np.ndarray
    phase_deg: np.ndarray
    U_gain_db: np.ndarray
    snr_db: np.ndarray
    tolerance_gain_db: float
    tolerance_phase_deg: float | None
    min_snr_db: float = DEFAULT_MIN_SNR_DB
    station_id: str | None = None
    created_utc: str | None = None
    file: str | None = None
    sha256: str | None = None

    def metadata_entry(self, profile=None) -> dict:
        """What the analysis needs to repeat the check (stored with the raw capture)."""
        return {"file": Path(self.file).name if self.file else None, "sha256": self.sha256,
                "serial": self.serial, "profile_id": self.profile_id, "created_utc": self.created_utc,
                "station_id": self.station_id,
                "tolerance": {"gain_db": self.tolerance_gain_db, "phase_deg": self.tolerance_phase_deg},
                "min_snr_db": self.min_snr_db,
                "freq_hz": [float(x) for x in self.freq_hz], "gain_db": [_num(x) for x in self.gain_db],
                "phase_deg": [_num(x) for x in self.phase_deg], "U_gain_db": [_num(x) for x in self.U_gain_db],
                "snr_db": [_num(x) for x in self.snr_db]}


def _num(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def _arr(values) -> np.ndarray:
    return np.array([np.nan if v is None else float(v) for v in values], dtype=float)


# --------------------------------------------------------------------------------------
# store
def golden_from_certificate(cert_path, *, tolerance_gain_db: float, tolerance_phase_deg: float | None = None,
                            min_snr_db: float = DEFAULT_MIN_SNR_DB, when: _dt.datetime | None = None) -> dict:
    """The golden-file document made from a certificate of the golden unit.

    Raises ConfigError when the certificate cannot be read, is invalid, has no points,
    or a tolerance is not positive.
    """
    path = Path(cert_path)
    try:
        raw = path.read_bytes()
        cert = json.loads(raw.decode("utf-8"))
    except FileNotFoundError:
        raise ConfigError(str(path), None, "file not found") from None
    except (OSError, ValueError) as exc:
        raise ConfigError(str(path), None, f"not a certificate ({exc})") from None
    if not isinstance(cert, dict) or "points" not in cert or "profile" not in cert:
        raise ConfigError(str(path), "points", "not a certificate (no points / profile)")
    if cert.get("verdict") == "invalid":
        raise ConfigError(str(path), "verdict", "the measurement is invalid; a golden response needs a proper one")
    for name, v in (("--tolerance-db", tolerance_gain_db), ("--tolerance-deg", tolerance_phase_deg)):
        if v is not None and not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise ConfigError(None, name, f"must be a positive number, got {v!r}")
    pts = [dict(p) for p in cert["points"] if p.get("gain_db") is not None]
    delay = ((cert.get("response") or {}).get("delay_s")) or 0.0
    for p in pts:         # the full phase: the fitted bulk delay varies from run to run
        p["phase_deg"] = None if p.get("phase_deg") is None else \
            float((p["phase_deg"] - 360.0 * p["frequency_hz"] * delay + 180.0) % 360.0 - 180.0)
    if not pts:
        raise ConfigError(str(path), "points", "the certificate has no measured points")
    when = when or _dt.datetime.now(_dt.timezone.utc)
    keep = ("frequency_hz", "gain_db", "phase_deg", "U_gain_db", "U_phase_deg", "snr_db")  # phase_deg: full
    return {
        "schema": SCHEMA, "kind": KIND,
        "serial": (cert.get("unit") or {}).get("serial"),
        "profile": {k: (cert.get("profile") or {}).get(k) for k in ("id", "revision", "sha256")},
        "station_id": (cert.get("station") or {}).get("id"),
        "created_utc": when.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "source_certificate": {"id": cert.get("id"), "file": path.name,
                               "sha256": hashlib.sha256(raw).hexdigest(), "issued_utc": cert.get("issued_utc")},
        "tolerance": {"gain_db": float(tolerance_gain_db),
                      "phase_deg": None if tolerance_phase_deg is None else float(tolerance_phase_deg)},
        "min_snr_db": float(min_snr_db),
        "points": [{k: p.get(k) for k in keep} for p in pts],
    }


def write_golden(doc: dict, path) -> Path:
    """Write a golden file; an existing file is never overwritten (ConfigError)."""
    from harness.certificate import canonical_json, write_new_file

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        return write_new_file(path, canonical_json(doc))
    except FileExistsError:
        raise ConfigError(str(path), None, "exists already; a golden file is never overwritten (choose a new "
                                           "name)") from None


def load_golden(path, *, profile=None, serial: str | None = None) -> GoldenUnit:
    """Read and validate a golden file; with `profile` / `serial`, check it was made for
    that profile and that unit.

    Raises ConfigError (file, key, problem).
    """
    path = Path(path)
    file = str(path)
    try:
        raw = path.read_bytes()
        doc = json.loads(raw.decode("utf-8"))
    except FileNotFoundError:
        raise ConfigError(file, None, "file not found") from None
    except (OSError, ValueError) as exc:
        raise ConfigError(file, None, f"not a golden-unit file ({exc})") from None
    if not isinstance(doc, dict) or doc.get("kind") != KIND:
        raise ConfigError(file, "kind", f"not a golden-unit file (expected kind = {KIND!r}; make one with "
                                        "'harness golden store CERT.json --out FILE --tolerance-db X')")
    if doc.get("schema") != SCHEMA:
        raise ConfigError(file, "schema", f"unsupported schema {doc.get('schema')!r} (this harness reads {SCHEMA})")
    tol = doc.get("tolerance") or {}
    tg, tp = tol.get("gain_db"), tol.get("phase_deg")
    if not isinstance(tg, (int, float)) or isinstance(tg, bool) or not tg > 0:
        raise ConfigError(file, "tolerance.gain_db", f"must be a positive number, got {tg!r}")
    if tp is not None and (not isinstance(tp, (int, float)) or isinstance(tp, bool) or not tp > 0):
        raise ConfigError(file, "tolerance.phase_deg", f"must be a positive number or null, got {tp!r}")
    pts = doc.get("points")
    if not isinstance(pts, list) or not pts:
        raise ConfigError(file, "points", "must be a non-empty list of points")
    try:
        f = _arr(p["frequency_hz"] for p in pts)
        g = _arr(p["gain_db"] for p in pts)
        ph = _arr(p.get("phase_deg") for p in pts)
        ug = _arr(p.get("U_gain_db") for p in pts)
        snr = _arr(p.get("snr_db") for p in pts)
    except (KeyError, TypeError, ValueError) as exc:
        raise ConfigError(file, "points", f"malformed point ({exc})") from None
    if np.any(~np.isfinite(f)) or np.any(f <= 0):
        raise ConfigError(file, "points", "every point needs a positive frequency_hz")
    prof = doc.get("profile") or {}
    if profile is not None and prof.get("id") != profile.id:
        raise ConfigError(file, "profile.id", f"made for profile '{prof.get('id')}', this run measures "
                                              f"'{profile.id}'")
    if serial is not None and doc.get("serial") is not None and str(doc["serial"]) != str(serial):
        raise ConfigError(file, "serial", f"the golden file is for unit '{doc['serial']}', this run measures "
                                          f"'{serial}' (put the golden unit on the station)")
    return GoldenUnit(serial=str(doc.get("serial")), profile_id=str(prof.get("id")),
                      profile_revision=prof.get("revision"), freq_hz=f, gain_db=g, phase_deg=ph, U_gain_db=ug,
                      snr_db=snr, tolerance_gain_db=float(tg), tolerance_phase_deg=None if tp is None else float(tp),
                      min_snr_db=float(doc.get("min_snr_db", DEFAULT_MIN_SNR_DB)), station_id=doc.get("station_id"),
                      created_utc=doc.get("created_utc"), file=file, sha256=hashlib.sha256(raw).hexdigest())


# --------------------------------------------------------------------------------------
# compare
def compare(entry: dict, freq_hz, gain_db, phase_deg, snr_db, valid, *, phase_assessed: bool = True) -> dict:
    """Compare today's response with a golden entry (`GoldenUnit.metadata_entry`).

    Parameters
    ----------
    entry : dict
        The stored golden response and its tolerance.
    freq_hz, gain_db, phase_deg, snr_db : array_like
        Today's points (gain as judged; full phase, every delay included).
    valid : array_like of bool
        Today's points that were measured properly.
    phase_assessed : bool
        False when today's phase cannot be trusted (then only gains are compared).

    Returns
    -------
    dict
        ``verdict`` ("verified" | "not verified"), ``reason``, ``points_compared``,
        ``worst_gain`` / ``worst_phase`` (frequency, today, stored, difference),
        ``tolerance``, the golden file's name, hash, serial and date.
    """
    f = np.asarray(freq_hz, dtype=float)
    g = np.asarray(gain_db, dtype=float)
    ph = np.asarray(phase_deg, dtype=float)
    snr = np.asarray(snr_db, dtype=float)
    ok = np.asarray(valid, dtype=bool)
    gf, gg = _arr(entry["freq_hz"]), _arr(entry["gain_db"])
    gp, gs = _arr(entry["phase_deg"]), _arr(entry["snr_db"])
    tol = entry["tolerance"]
    tg, tp = float(tol["gain_db"]), tol.get("phase_deg")
    min_snr = float(entry.get("min_snr_db", DEFAULT_MIN_SNR_DB))
    out = {"file": entry.get("file"), "sha256": entry.get("sha256"), "serial": entry.get("serial"),
           "created_utc": entry.get("created_utc"), "tolerance": {"gain_db": tg, "phase_deg": tp},
           "min_snr_db": min_snr, "points_compared": 0, "phase_compared": False}
    rows = []
    missing = 0
    for j, fj in enumerate(gf):
        i = int(np.argmin(np.abs(f - fj))) if f.size else -1
        if i < 0 or abs(f[i] - fj) > FREQ_MATCH_REL * fj:
            missing += 1
            continue
        if not (ok[i] and snr[i] >= min_snr and np.isfinite(gs[j]) and gs[j] >= min_snr and np.isfinite(gg[j])):
            continue
        dp = np.nan
        if np.isfinite(gp[j]) and np.isfinite(ph[i]):
            dp = (ph[i] - gp[j] + 180.0) % 360.0 - 180.0
        rows.append((fj, g[i], gg[j], g[i] - gg[j], ph[i], gp[j], dp))
    if missing:
        out.update(verdict="not verified",
                   reason=f"golden unit check: {missing} stored frequencies were not measured today (was the "
                          "profile or the sample rate changed?); the station is not verified")
        return out
    if not rows:
        out.update(verdict="not verified",
                   reason=f"golden unit check: no point was measured with SNR >= {min_snr:g} dB in both the stored "
                          "and today's measurement; the station is not verified")
        return out
    r = np.array(rows, dtype=float)
    out["points_compared"] = int(r.shape[0])
    w = int(np.argmax(np.abs(r[:, 3])))
    out["worst_gain"] = {"frequency_hz": r[w, 0], "today_db": r[w, 1], "stored_db": r[w, 2], "difference_db": r[w, 3]}
    bad = []
    if abs(r[w, 3]) > tg:
        bad.append(f"gain differs by {r[w, 3]:+.3f} dB at {r[w, 0]:g} Hz (tolerance {tg:g} dB)")
    if tp is not None and phase_assessed and np.any(np.isfinite(r[:, 6])):
        out["phase_compared"] = True
        k = int(np.nanargmax(np.abs(r[:, 6])))
        out["worst_phase"] = {"frequency_hz": r[k, 0], "today_deg": r[k, 4], "stored_deg": r[k, 5],
                              "difference_deg": r[k, 6]}
        if abs(r[k, 6]) > float(tp):
            bad.append(f"phase differs by {r[k, 6]:+.2f} deg at {r[k, 0]:g} Hz (tolerance {float(tp):g} deg)")
    if bad:
        out.update(verdict="not verified",
                   reason=f"golden unit check FAILED against {entry.get('file')} ({entry.get('serial')}): "
                          f"{'; '.join(bad)}; the station is not verified: check cables, levels and the "
                          "calibration before measuring")
    else:
        phase = (f", phase within {float(tp):g} deg" if out["phase_compared"] else
                 (", phase not compared (today's phase was not assessed)" if tp is not None else ""))
        out.update(verdict="verified",
                   reason=f"golden unit check: station verified against {entry.get('file')} "
                          f"({out['points_compared']} points, largest gain difference {r[w, 3]:+.3f} dB at "
                          f"{r[w, 0]:g} Hz, tolerance {tg:g} dB{phase})")
    return out


def apply_golden(analysis, entry: dict) -> None:
    """Add the golden-unit check to an analysis (`harness.analysis.analyze` calls this
    when the capture carries a golden entry): ``analysis.golden_check`` holds the
    comparison, its sentence joins the reasons, and a station that is not verified makes
    the verdict ``invalid``."""
    if analysis.freq_hz.size == 0:          # nothing measured: the verdict is invalid already
        analysis.golden_check = {"verdict": "not verified", "reason": "golden unit check: nothing was measured",
                                 "file": entry.get("file")}
        return
    pc = analysis.phase_check or {}
    valid = np.array([str(v) not in ("invalid",) for v in analysis.point_verdict], dtype=bool)
    full_phase = np.degrees(np.angle(analysis.h))
    res = compare(entry, analysis.freq_hz, analysis.gain_db, full_phase, analysis.snr_db, valid,
                  phase_assessed=pc.get("assessed", True) is not False)
    analysis.golden_check = res
    if res["verdict"] == "verified":
        analysis.reasons.append(res["reason"])
    else:
        analysis.reasons.insert(0, res["reason"])
        analysis.verdict = "invalid"


# --------------------------------------------------------------------------------------
# command line: `harness golden store` (registered by harness.audio_cli)
def register(sub) -> None:
    g = sub.add_parser("golden", help="golden-unit files: store a reference board's response")
    gs = g.add_subparsers(dest="golden_verb", metavar="ACTION")
    st = gs.add_parser("store", help="make a golden file from a certificate of the golden unit")
    st.add_argument("certificate", help="certificate JSON of the golden unit, measured on a known-good station")
    st.add_argument("--out", required=True, help="golden file to write (never overwritten)")
    st.add_argument("--tolerance-db", type=float, required=True,
                    help="largest gain difference (dB) that still verifies the station")
    st.add_argument("--tolerance-deg", type=float, default=None,
                    help="largest phase difference (deg); default: phase not compared")
    st.add_argument("--min-snr-db", type=float, default=DEFAULT_MIN_SNR_DB,
                    help=f"compare only points with at least this SNR in both (default {DEFAULT_MIN_SNR_DB:g} dB)")
    st.set_defaults(func=_cmd_store)


def _cmd_store(args) -> int:
    doc = golden_from_certificate(args.certificate, tolerance_gain_db=args.tolerance_db,
                                  tolerance_phase_deg=args.tolerance_deg, min_snr_db=args.min_snr_db)
    path = write_golden(doc, args.out)
    tol = doc["tolerance"]
    phase = f", phase {tol['phase_deg']:g} deg" if tol["phase_deg"] is not None else ""
    print(f"golden unit {doc['serial']} for profile {doc['profile']['id']}: {len(doc['points'])} points, "
          f"tolerance {tol['gain_db']:g} dB{phase}")
    print(f"  written to {path}")
    return 0
