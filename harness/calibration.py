"""Chain calibration: the response of the measurement chain itself, measured through a
loopback (the board replaced by a through connection), stored with its uncertainty,
date, due date and the station's identity.

A station without a reference channel divides every measurement by this response and
adds its uncertainty to the budget; a station with a reference channel uses it as a
check of the chain (the ratio of its two inputs). `load_calibration` refuses (exit 4) a
calibration that is missing, expired or from another station.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import uuid
from pathlib import Path

import numpy as np

from harness.analysis import ChainCalibration, estimate_response
from harness.backends.base import assert_level
from harness.certificate import canonical_json, write_new_file
from harness.errors import ConfigError, InvalidMeasurement
from harness.mask import Band, LimitLine, Mask
from harness.profile import DecisionConfig, Profile, StimulusConfig
from harness.station import Station

SCHEMA = 1
MIN_SNR_DB = 40.0  # a loopback is a wire: anything noisier means a bad connection


def calibration_profile(station: Station, *, f_min_hz: float = 10.0, level_dbfs: float = -12.0) -> Profile:
    """The internal profile a calibration runs: a log multitone (24 points per decade)
    from `f_min_hz` up to just below Nyquist (the plan drops what the station cannot
    excite) with a wide-open mask (a loopback has no limits)."""
    f_max = 0.499 * station.sample_rate_hz
    level = min(level_dbfs, station.max_output_dbfs)
    band = Band("limits", f_min_hz, f_max, upper=LimitLine((f_min_hz, f_max), (40.0, 40.0)), label="chain")
    mask = Mask(bands=(band,))
    stim = StimulusConfig(method="multitone", points_per_decade=24, start_hz=f_min_hz, stop_hz=f_max,
                          level_dbfs=level, periods=8, transient_periods=1)
    return Profile(id="chain-calibration", title="chain calibration (loopback)", revision="1", mask=mask,
                   stimulus=stim, decision=DecisionConfig("simple", 0.95, 0.95))


def loopback_device(sample_rate_hz: float):
    """A through connection as a simulated device model (for simulated stations)."""
    from harness.device import DeviceModel, FilterSpec

    through = FilterSpec(form="sos", domain="digital", sample_rate_hz=sample_rate_hz,
                         sos=((1.0, 0.0, 0.0, 1.0, 0.0, 0.0),))
    return DeviceModel(id="loopback", filter=through, model="through connection")


def calibrate(station: Station, backend, *, when: _dt.datetime | None = None, f_min_hz: float = 10.0) -> dict:
    """Measure the chain through a loopback and return the calibration document
    (from `f_min_hz` to just below Nyquist; see `calibration_profile`)."""
    from harness.stimulus import plan_for_profile

    when = when or _dt.datetime.now(_dt.timezone.utc)
    prof = calibration_profile(station, f_min_hz=f_min_hz)
    plan = plan_for_profile(prof, station.sample_rate_hz)
    stim = np.asarray(plan.signal(), dtype=np.float64)
    assert_level(stim, station.max_output_dbfs)
    cap = backend.play_and_capture(stim, extra_samples=plan.extra_samples(int(station.max_latency_samples)))
    est = estimate_response(plan, cap)
    snr = np.asarray(est.snr_db, dtype=float)
    if np.any(~np.asarray(est.valid, dtype=bool)) or np.any(snr < MIN_SNR_DB):
        j = int(np.argmin(snr))
        raise InvalidMeasurement(f"loopback too noisy for a calibration: SNR {snr[j]:.1f} dB at "
                                 f"{est.freq_hz[j]:g} Hz (need {MIN_SNR_DB:g} dB); check the through connection")
    h = np.asarray(est.h, dtype=complex)
    due = when + _dt.timedelta(days=station.calibration.valid_days)
    ident = {}
    try:
        ident = backend.identity()
    except Exception as exc:  # informative only
        ident = {"error": str(exc)}
    g = 20 * np.log10(np.abs(h))
    return {
        "schema": SCHEMA,
        "id": f"cal-{when.strftime('%Y%m%dT%H%M%SZ')}-{uuid.uuid4().hex[:6]}",
        "station_id": station.id,
        "station_file_sha256": station.sha256,
        "created_utc": when.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "due_utc": due.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "valid_days": station.calibration.valid_days,
        "sample_rate_hz": station.sample_rate_hz,
        "reference_channel": station.reference_channel,
        "instruments": ident,
        "method": "loopback multitone, ratio of averaged spectra",
        "freq_hz": [float(x) for x in est.freq_hz],
        "h_re": [float(x) for x in h.real],
        "h_im": [float(x) for x in h.imag],
        "u_gain_db": [float(x) for x in est.u_gain_db],
        "u_phase_deg": [float(x) for x in est.u_phase_deg],
        "dof": [float(x) for x in est.dof],
        "delay_s": float(getattr(est, "delay_s", 0.0) or 0.0),
        "summary": {"gain_min_db": float(g.min()), "gain_max_db": float(g.max()),
                    "u_gain_max_db": float(np.max(est.u_gain_db))},
    }


def write_calibration(station: Station, doc: dict) -> Path:
    """Write the calibration to the station's calibration file. An existing file is
    first kept under an archive name (``<name>.<created>.json``); nothing is lost."""
    path = station.calibration.file
    if path is None:
        raise ConfigError(station.path, "calibration.file", "missing key (where should the calibration go?)")
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    data = canonical_json(doc)
    if path.exists():
        try:
            old = json.loads(path.read_text(encoding="utf-8"))
            tag = str(old.get("created_utc", "old")).replace(":", "")
        except (OSError, ValueError):
            tag = "unreadable"
        archive = path.with_name(f"{path.stem}.{tag}{path.suffix}")
        n = 1
        while archive.exists():
            n += 1
            archive = path.with_name(f"{path.stem}.{tag}-{n}{path.suffix}")
        os.link(path, archive)
        tmp = path.with_name(f".tmp-{uuid.uuid4().hex}{path.suffix}")
        write_new_file(tmp, data)
        os.replace(tmp, path)
    else:
        write_new_file(path, data)
    return path


def calibrate_from_files(station_path) -> tuple[dict, Path]:
    """`harness calibrate --station FILE`: loopback measurement, written to the station's
    calibration file."""
    from harness.measure import make_backend
    from harness.station import load_station

    station = load_station(station_path)
    if station.calibration.file is None:
        raise ConfigError(station.path, "calibration.file", "missing key (where should the calibration go?)")
    device = loopback_device(station.sample_rate_hz) if station.backend == "simulated" else None
    backend = make_backend(station, device=device)
    try:
        doc = calibrate(station, backend)
    finally:
        backend.close()
    return doc, write_calibration(station, doc)


def parse_calibration(doc: dict, file: str) -> ChainCalibration:
    try:
        f = np.asarray(doc["freq_hz"], dtype=float)
        h = np.asarray(doc["h_re"], dtype=float) + 1j * np.asarray(doc["h_im"], dtype=float)
        ug = np.asarray(doc["u_gain_db"], dtype=float)
        up = np.asarray(doc["u_phase_deg"], dtype=float)
        dof = np.asarray([np.inf if x is None else x for x in doc["dof"]], dtype=float)
    except (KeyError, TypeError, ValueError) as exc:
        raise ConfigError(file, str(exc).strip("'"), "calibration file is incomplete or malformed") from None
    if not (f.size == h.size == ug.size == up.size == dof.size) or f.size < 2:
        raise ConfigError(file, "freq_hz", "calibration arrays differ in length")
    return ChainCalibration(f, h, ug, up, dof, str(doc.get("id", "")))


def load_calibration(station: Station, *, now: _dt.datetime | None = None):
    """The station's chain calibration, checked: returns ``(ChainCalibration, info)``,
    or ``(None, None)`` when the station names no calibration file.

    Raises InvalidMeasurement (exit 4) when the file is missing, expired, or belongs
    to another station; ConfigError (exit 2) when it is malformed.
    """
    path = station.calibration.file
    if path is None:
        return None, None
    path = Path(path)
    if not path.is_file():
        raise InvalidMeasurement(f"calibration file {path} is missing: run "
                                 f"'harness calibrate --station {station.path}' first")
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ConfigError(str(path), None, f"not a calibration file ({exc})") from None
    if doc.get("station_id") != station.id:
        raise InvalidMeasurement(f"calibration {path} belongs to station '{doc.get('station_id')}', "
                                 f"not '{station.id}'")
    now = now or _dt.datetime.now(_dt.timezone.utc)
    try:
        due = _dt.datetime.strptime(doc["due_utc"], "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=_dt.timezone.utc)
    except (KeyError, ValueError):
        raise ConfigError(str(path), "due_utc", "missing or not a UTC time stamp") from None
    if now > due:
        raise InvalidMeasurement(f"calibration {doc.get('id')} of station {station.id} expired on "
                                 f"{doc['due_utc']}: run 'harness calibrate --station {station.path}'")
    if float(doc.get("sample_rate_hz", station.sample_rate_hz)) != station.sample_rate_hz:
        raise InvalidMeasurement(f"calibration {path} was made at {doc.get('sample_rate_hz')} Hz, the station "
                                 f"now runs at {station.sample_rate_hz:g} Hz: recalibrate")
    cal = parse_calibration(doc, str(path))
    info = {"id": doc.get("id"), "created_utc": doc.get("created_utc"), "due_utc": doc["due_utc"],
            "file": path.name}
    return cal, info
