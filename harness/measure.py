"""Measuring one unit: plan, level check, play and capture, analysis, certificate.

`measure_unit` is the Python API behind ``harness run`` and ``harness demo``. It never
raises for a bad measurement: an invalid capture or a hardware fault produces a
certificate with verdict ``invalid`` and the reason. It does raise for configuration
errors (ConfigError) and for a stimulus above the station's limit (LevelLimitError),
before anything is played.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from harness import certificate as certs
from harness.analysis import Analysis, ChainCalibration, StationFacts, analyze
from harness.backends.base import Backend, Capture, assert_level
from harness.errors import VERDICT_EXIT, InvalidMeasurement
from harness.profile import Profile
from harness.station import Station


@dataclass
class UnitResult:
    """Outcome of one measured unit."""

    serial: str
    verdict: str
    reasons: list[str]
    certificate: dict
    json_path: Path | None = None
    html_path: Path | None = None
    raw_path: Path | None = None
    analysis: Analysis | None = None
    plan_report: dict = field(default_factory=dict)

    @property
    def exit_code(self) -> int:
        return VERDICT_EXIT[self.verdict]

    @property
    def worst(self) -> dict | None:
        pts = [p for p in self.certificate.get("points", []) if p.get("margin_db") is not None]
        return min(pts, key=lambda p: p["margin_db"]) if pts else None


def station_facts(station: Station) -> StationFacts:
    return StationFacts(id=station.id, reference_channel=station.reference_channel,
                        type_b=station.type_b, min_snr_db=station.min_snr_db)


def plan_info(plan) -> dict:
    """A JSON description of a plan (stored with the raw capture)."""
    keys = ("method", "sample_rate_hz", "period_samples", "periods", "transient_periods",
            "duration_s", "level_dbfs")
    info = {k: getattr(plan, k) for k in keys if hasattr(plan, k)}
    info["method"] = info.get("method") or ("stepped-sine" if type(plan).__name__ == "SteppedSinePlan" else "multitone")
    info["freq_hz"] = [float(x) for x in np.asarray(plan.freq_hz)]
    cf = getattr(plan, "crest_factor", None)
    if cf is not None:
        info["crest_factor"] = float(cf)
    unc = getattr(plan, "uncovered_hz", None)
    if unc is not None:
        info["uncovered_hz"] = [float(x) for x in unc]
    return certs._jsonable(info)


def _profile_copy(profile: Profile, out_dir: Path) -> str | None:
    """Keep a copy of the profile beside the certificates (named by id and hash) so a
    certificate can be recomputed from its folder alone. Never overwrites."""
    if not profile.path or not profile.sha256:
        return None
    name = f"profile-{certs.safe_name(profile.id)}-{profile.sha256[:12]}.toml"
    dest = out_dir / name
    if not dest.exists():
        data = Path(profile.path).read_bytes()
        if hashlib.sha256(data).hexdigest() != profile.sha256:
            raise InvalidMeasurement(f"profile file {profile.path} changed while measuring")
        try:
            certs.write_new_file(dest, data)
        except FileExistsError:
            pass
    return name


def measure_unit(profile: Profile, station: Station, serial: str, *, backend: Backend, out_dir: Path,
                 unit: dict | None = None, calibration: ChainCalibration | None = None,
                 calibration_info: dict | None = None, plan=None, write_plot: bool | str = True,
                 golden=None) -> UnitResult:
    """Measure one unit and write its certificate (JSON + HTML + raw .npz) into `out_dir`.

    Parameters
    ----------
    profile, station : the loaded profile and station.
    serial : the unit's serial number (any text; file names are made safe).
    backend : the measurement path (simulated board, audio interface, instruments).
    out_dir : folder for the records; created if needed; nothing in it is overwritten.
    unit : extra unit facts for the certificate (``model``, ``firmware``).
    calibration : chain calibration to divide by when the station has no reference channel.
    plan : a prepared stimulus plan (default: built from the profile for the station).
    write_plot : True, False, or ``"not-pass"`` (plot only units that did not pass).
    golden : a `harness.golden.GoldenUnit` to compare the measured response with (the
        unit on the station is the golden unit; a failed check makes the result invalid).

    A station with a ``[signing]`` section signs the certificate (`harness.signing`).
    """
    from harness.stimulus import plan_for_profile

    out_dir = Path(out_dir)
    if plan is None:
        plan = plan_for_profile(profile, station.sample_rate_hz)
    stimulus = np.asarray(plan.signal(), dtype=np.float64)
    assert_level(stimulus, station.max_output_dbfs)            # before anything is played
    facts = station_facts(station)
    when = _dt.datetime.now(_dt.timezone.utc)
    extra = plan.extra_samples(int(station.max_latency_samples))
    try:
        steps = getattr(backend, "measure_steps", None)     # instrument-native stepped sine (visa)
        if steps is not None and getattr(plan, "method", None) == "stepped-sine":
            capture = steps(plan, extra_samples=extra)
        else:
            capture = backend.play_and_capture(stimulus, extra_samples=extra)
    except InvalidMeasurement as exc:
        capture = None
        analysis = Analysis("invalid", [exc.reason], profile.decision.rule, profile.decision.confidence)
    else:
        capture = certs.quantize_capture(capture)     # analyse exactly what is stored
        # stored with the capture so that the analysis (and a recomputation) sees them:
        # whether the calibration shares the capture's stream session (phase, no
        # reference channel) and the golden unit's stored response
        if calibration is not None and capture.metadata.get("stream_session"):
            capture.metadata["calibration_stream_session"] = (calibration_info or {}).get("stream_session")
        if golden is not None:
            capture.metadata["golden"] = golden.metadata_entry(profile)
        analysis = analyze(profile, plan, capture, facts, calibration)

    out_dir.mkdir(parents=True, exist_ok=True)
    stem = certs.new_stem(out_dir, serial, when)
    raw_name = f"{stem}.npz"
    if capture is None:
        capture = Capture(np.zeros(0), None, station.sample_rate_hz, {"error": analysis.reasons[0]})
    raw = certs.raw_bytes(stimulus, capture, plan_info(plan), calibration)
    raw_sha = hashlib.sha256(raw).hexdigest()
    profile_file = _profile_copy(profile, out_dir)

    ident = {}
    try:
        ident = backend.identity()
    except Exception as exc:  # identity is informative only; never lose a measurement over it
        ident = {"error": str(exc)}
    unit_doc = {"model": None, "firmware": None}
    unit_doc.update(unit or {})
    station_doc = {"id": station.id, "backend": station.backend, "instruments": ident,
                   "sample_rate_hz": station.sample_rate_hz, "max_output_dbfs": station.max_output_dbfs,
                   "station_file_sha256": station.sha256, "calibration": calibration_info}
    measurement = {"method": plan_info(plan)["method"], "duration_s": float(getattr(plan, "duration_s", 0.0)),
                   "level_dbfs": float(profile.stimulus.level_dbfs),
                   "crest_factor": plan_info(plan).get("crest_factor"),
                   "frequencies_not_covered_hz": plan_info(plan).get("uncovered_hz", []),
                   "capture_samples": int(np.size(capture.response))}
    cert = certs.build_certificate(profile=profile, analysis=analysis, serial=serial, unit=unit_doc,
                                   station=station_doc, station_facts=facts, measurement=measurement,
                                   raw_name=raw_name, raw_sha256=raw_sha,
                                   issued_utc=when.strftime("%Y-%m-%dT%H:%M:%SZ"))
    if profile_file:
        cert["profile"]["file"] = profile_file
    if getattr(analysis, "golden_check", None):
        cert["golden_check"] = analysis.golden_check
    if station.section("signing") is not None:     # Ed25519 signature block (harness.signing)
        from harness.signing import sign_for_station

        cert = sign_for_station(cert, station.section("signing"))

    png = None
    if write_plot and (write_plot != "not-pass" or analysis.verdict != "pass") and analysis.freq_hz.size:
        png = certificate_plot(profile, analysis, serial)
    raw_path = certs.write_new_file(out_dir / raw_name, raw)
    json_path = certs.write_new_file(out_dir / f"{stem}.json", certs.canonical_json(cert))
    html_path = certs.write_new_file(out_dir / f"{stem}.html", certs.render_html(cert, png).encode("utf-8"))
    return UnitResult(serial, analysis.verdict, analysis.reasons, cert, json_path, html_path, raw_path, analysis)


def certificate_plot(profile: Profile, a: Analysis, serial: str) -> bytes | None:
    """The certificate's Bode plot as PNG bytes (measured points with their expanded
    uncertainty over the mask)."""
    from harness.plot import bode_plot

    buf = io.BytesIO()
    gd = gd_f = None
    pc = a.phase_check or {}
    if pc.get("group_delay_s"):
        gd_f = a.freq_hz[profile.mask.in_pass_band(a.freq_hz)]
        gd = np.asarray(pc["group_delay_s"], dtype=float)
    kwargs = dict(phase_deg=a.phase_deg, u_gain_db=a.gain.expanded if a.gain is not None else None,
                  u_phase_deg=a.phase.expanded if a.phase is not None else None,
                  verdicts=[str(v) for v in a.point_verdict],
                  title=f"{serial}: {profile.id} rev {profile.revision or '-'}: {a.verdict.upper()}",
                  subtitle=f"decision rule: {a.rule}, coverage {a.confidence:g}; phase shown with the bulk delay "
                           f"{a.delay_s * 1e3:.3f} ms removed")
    if pc.get("rule") == "limits" and pc.get("phase_deg"):
        # the limit lines refer to the full phase (bulk delay included)
        kwargs.update(phase_deg=np.asarray(pc["phase_deg"], dtype=float),
                      u_phase_deg=np.asarray(pc["U_phase_deg"], dtype=float),
                      phase_freq_hz=np.asarray(pc["frequency_hz"], dtype=float))
        kwargs["subtitle"] = f"decision rule: {a.rule}, coverage {a.confidence:g}; full phase (limit lines)"
    if gd is not None:
        bode_plot(profile.mask, a.freq_hz, a.gain_db, path=buf, group_delay_s=gd, phase_freq_hz=gd_f,
                  **{k: v for k, v in kwargs.items() if k not in ("phase_deg", "u_phase_deg")})
    else:
        bode_plot(profile.mask, a.freq_hz, a.gain_db, path=buf, **kwargs)
    return buf.getvalue()


# --------------------------------------------------------------------------------------
# from files (the command line's `harness run`)
# --------------------------------------------------------------------------------------
def make_backend(station: Station, *, device=None, seed: int | None = None):
    """The backend a station file names. ``device`` overrides a simulated station's
    device model (a DeviceModel), e.g. for a lot of simulated units."""
    from harness.errors import ConfigError

    if station.backend == "simulated":
        from harness.backends.simulated import SimulatedBoard
        from harness.device import load_device_model

        model = device if device is not None else load_device_model(station.device_model)
        return SimulatedBoard(model, station.sample_rate_hz, reference_channel=station.reference_channel,
                              chain_latency_samples=station.chain_latency_samples,
                              seed=seed if seed is not None else station.seed)
    module = {"audio": "harness.backends.audio", "visa": "harness.backends.visa"}.get(station.backend)
    import importlib
    import importlib.util

    if module is None or importlib.util.find_spec(module) is None:
        raise ConfigError(station.path, "station.backend",
                          f"the '{station.backend}' backend is not available in this version of the harness")
    # each hardware backend module provides open_backend(station) -> Backend
    return importlib.import_module(module).open_backend(station)


def run_from_files(profile_path, station_path, serial: str, *, out_dir=None, golden=None) -> UnitResult:
    """Load a profile and a station, check the calibration, measure one unit."""
    from harness.calibration import load_calibration
    from harness.profile import load_profile
    from harness.station import load_station

    profile = load_profile(profile_path)
    station = load_station(station_path)
    if golden is not None:
        from harness.golden import load_golden

        golden = load_golden(golden, profile=profile, serial=serial)
    cal, cal_info = load_calibration(station)
    from harness.control import prepare_board

    # [station.control]: board identity into the unit, the profile's [control] mode and
    # gain set before measuring (raises InvalidMeasurement, exit 4, when it cannot be)
    board = prepare_board(station, profile, serial)
    backend = make_backend(station)
    try:
        ident = backend.identity()
        unit = {"model": ident.get("model"), "firmware": ident.get("firmware")}
        unit.update(board)
        out = Path(out_dir) if out_dir else (station.output_dir or Path("harness-out"))
        return measure_unit(profile, station, serial, backend=backend, out_dir=out, unit=unit,
                            calibration=cal, calibration_info=cal_info, golden=golden)
    finally:
        backend.close()
