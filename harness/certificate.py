"""Certificates: canonical JSON, a human-readable HTML page, and the raw capture (.npz)
whose SHA-256 the JSON carries; plus `recompute`, which repeats every figure from the
raw capture and the profile and reports any difference.

Files are written atomically and never overwrite an existing file: each attempt gets
its own names (serial made safe for a file name, UTC time stamp, and a counter when
needed), so nothing already recorded is lost.
"""

from __future__ import annotations

import base64
import datetime as _dt
import hashlib
import html
import io
import json
import math
import os
import re
import tempfile
import uuid
from pathlib import Path

import numpy as np

from harness import SOFTWARE_NAME, __version__
from harness.analysis import Analysis, ChainCalibration, StationFacts, analyze
from harness.backends.base import Capture
from harness.decision import RULE_TEXT
from harness.errors import ConfigError
from harness.profile import Profile, load_profile

SCHEMA = 1


# --------------------------------------------------------------------------------------
# files
# --------------------------------------------------------------------------------------
def safe_name(serial: str, max_len: int = 48) -> str:
    """A file-name stem from a serial number that cannot escape its folder.

    Keeps letters, digits, ``.``, ``-`` and ``_``; anything else becomes ``_``; no
    leading dot; when characters had to change, a short hash of the original is
    appended so two different serials never share a name.
    """
    cleaned = re.sub(r"[^A-Za-z0-9._-]", "_", serial).lstrip(".")[:max_len] or "unit"
    if cleaned != serial:
        cleaned += "-" + hashlib.sha256(serial.encode("utf-8")).hexdigest()[:8]
    return cleaned


def write_new_file(path: Path, data: bytes) -> Path:
    """Write `data` atomically to `path`, which must not exist yet.

    The bytes go to a temporary file in the same folder, are flushed to disk, and the
    file is then hard-linked to its final name (which fails rather than replaces an
    existing file) and the temporary name removed.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.link(tmp, path)
    finally:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
    return path


def write_unique(out_dir: Path, stem: str, ext: str, data: bytes) -> Path:
    """Write `data` atomically as ``stem + ext`` in `out_dir`, or ``stem-2 + ext`` ... when
    that name is taken: never overwrites."""
    n = 1
    while True:
        name = f"{stem}{ext}" if n == 1 else f"{stem}-{n}{ext}"
        try:
            return write_new_file(Path(out_dir) / name, data)
        except FileExistsError:
            n += 1


def new_stem(out_dir: Path, serial: str, when: _dt.datetime) -> str:
    """A name stem for this attempt that no existing file in `out_dir` uses."""
    base = f"{safe_name(serial)}_{when.strftime('%Y%m%dT%H%M%SZ')}"
    stem, n = base, 1
    while any((out_dir / f"{stem}{ext}").exists() for ext in (".json", ".html", ".npz")):
        n += 1
        stem = f"{base}-{n}"
    return stem


# --------------------------------------------------------------------------------------
# raw capture
# --------------------------------------------------------------------------------------
def stimulus_sha256(stimulus: np.ndarray) -> str:
    """SHA-256 of the played stimulus as little-endian float64 samples."""
    return hashlib.sha256(np.asarray(stimulus, dtype="<f8").tobytes()).hexdigest()


def quantize_capture(capture: Capture) -> Capture:
    """The capture as it is stored: both channels rounded to float32 (24-bit mantissa,
    enough for any audio converter or digitiser). The analysis runs on exactly these
    samples, so the certificate recomputes bit for bit from the raw file."""
    def q(x):
        return None if x is None else np.asarray(x, dtype=np.float32).astype(np.float64)

    return Capture(q(capture.response), q(capture.reference), capture.sample_rate_hz, dict(capture.metadata))


def raw_bytes(stimulus: np.ndarray, capture: Capture, plan_info: dict,
              calibration: ChainCalibration | None = None) -> bytes:
    """The raw capture as .npz bytes: the captured channels (float32), the sample rate,
    the SHA-256 of the played stimulus (which the profile regenerates), the plan
    description and (when used) the chain calibration divided by. Uncompressed: noise
    does not compress, and writing must not slow a production line."""
    arrays = {
        "stimulus_sha256": np.frombuffer(stimulus_sha256(stimulus).encode(), dtype=np.uint8),
        "response": np.asarray(capture.response, dtype=np.float32),
        "sample_rate_hz": np.float64(capture.sample_rate_hz),
        "plan_json": np.frombuffer(json.dumps(plan_info, sort_keys=True).encode(), dtype=np.uint8),
        "metadata_json": np.frombuffer(json.dumps(_jsonable(capture.metadata), sort_keys=True).encode(),
                                       dtype=np.uint8),
    }
    if capture.reference is not None:
        arrays["reference"] = np.asarray(capture.reference, dtype=np.float32)
    if calibration is not None:
        arrays.update(cal_freq_hz=calibration.freq_hz, cal_h=calibration.h,
                      cal_u_gain_db=calibration.u_gain_db, cal_u_phase_deg=calibration.u_phase_deg,
                      cal_dof=calibration.dof,
                      cal_id=np.frombuffer(calibration.id.encode(), dtype=np.uint8))
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def read_raw(data: bytes) -> tuple[str, Capture, dict, ChainCalibration | None]:
    """(stimulus SHA-256, capture as float64, plan description, calibration or None)."""
    with np.load(io.BytesIO(data), allow_pickle=False) as z:
        stim = bytes(z["stimulus_sha256"]).decode()
        ref = z["reference"].astype(np.float64) if "reference" in z.files else None
        meta = json.loads(bytes(z["metadata_json"]).decode())
        cap = Capture(z["response"].astype(np.float64), ref, float(z["sample_rate_hz"]), meta)
        plan_info = json.loads(bytes(z["plan_json"]).decode())
        cal = None
        if "cal_h" in z.files:
            cal = ChainCalibration(z["cal_freq_hz"], z["cal_h"], z["cal_u_gain_db"], z["cal_u_phase_deg"],
                                   z["cal_dof"], bytes(z["cal_id"]).decode())
    return stim, cap, plan_info, cal


# --------------------------------------------------------------------------------------
# JSON
# --------------------------------------------------------------------------------------
def _num(x) -> float | None:
    """A JSON number, or null for NaN / infinity (no limit, not computed)."""
    x = float(x)
    return x if math.isfinite(x) else None


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return _num(obj)
    if isinstance(obj, complex):
        return [_num(obj.real), _num(obj.imag)]
    if isinstance(obj, Path):
        return str(obj)
    return obj


def canonical_json(doc: dict) -> bytes:
    """Canonical bytes of a certificate: sorted keys, compact separators, UTF-8."""
    return json.dumps(_jsonable(doc), sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


def analysis_section(a: Analysis) -> dict:
    """The part of a certificate that is computed from the raw capture (recomputable)."""
    points = []
    g, p = a.gain, a.phase
    for i in range(a.freq_hz.size):
        points.append({
            "frequency_hz": _num(a.freq_hz[i]),
            "gain_db": _num(a.gain_db[i]),
            "phase_deg": _num(a.phase_deg[i]),
            "u_gain_db": _num(g.u_c[i]),
            "U_gain_db": _num(g.expanded[i]),
            "k_gain": _num(g.k[i]),
            "dof_gain": _num(g.nu_eff[i]),
            "u_phase_deg": _num(p.u_c[i]),
            "U_phase_deg": _num(p.expanded[i]),
            "limit_low_db": _num(a.low_db[i]),
            "limit_high_db": _num(a.high_db[i]),
            "margin_db": _num(a.margin_db[i]),
            "snr_db": _num(a.snr_db[i]),
            "probability": _num(a.probability[i]),
            "verdict": str(a.point_verdict[i]),
            "outcome": str(a.point_outcome[i]),
        })
    return {
        "verdict": a.verdict,
        "reasons": list(a.reasons),
        "points": points,
        "bands": a.bands,
        "phase_check": a.phase_check,
        "budget": {"gain": g.to_dict() if g else None, "phase": p.to_dict() if p else None},
        "response": {"delay_s": _num(a.delay_s), "u_delay_s": _num(a.u_delay_s),
                     "reference_index": a.reference_index, "notes": list(a.point_notes),
                     "phase_convention": "phase_deg is the phase with the bulk delay delay_s removed"},
        "estimate": a.estimate,
    }


def conformity_statement(profile: Profile, a: Analysis) -> str:
    """ISO/IEC 17025:2017 7.8.6: names the specification, the results covered and the rule."""
    n = int(np.sum(a.point_verdict != "none")) if a.point_verdict.size else 0
    word = {"pass": "CONFORMS to", "fail": "DOES NOT CONFORM to",
            "inconclusive": "cannot be stated to conform or not conform to",
            "invalid": "was NOT MEASURED PROPERLY against"}[a.verdict]
    return (f"The unit {word} specification {profile.id} revision {profile.revision or '-'} "
            f"({profile.title}), judged at {n} measured frequency points, under the decision rule: "
            f"{RULE_TEXT[a.rule]}, coverage probability {a.confidence:g}.")


def build_certificate(*, profile: Profile, analysis: Analysis, serial: str, unit: dict, station: dict,
                      station_facts: StationFacts, measurement: dict, raw_name: str, raw_sha256: str,
                      issued_utc: str | None = None, cert_id: str | None = None) -> dict:
    """Assemble the certificate document (see DESIGN.md, 'Contract: certificate')."""
    d = profile.decision
    doc = {
        "schema": SCHEMA,
        "id": cert_id or str(uuid.uuid4()),
        "issued_utc": issued_utc or _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "statement": conformity_statement(profile, analysis),
        "profile": {"id": profile.id, "revision": profile.revision, "title": profile.title,
                    "sha256": profile.sha256, "file": Path(profile.path).name if profile.path else None},
        "unit": {"serial": serial, **unit},
        "station": {**station, "facts": station_facts.to_dict()},
        "decision": {"rule": d.rule, "confidence": d.confidence,
                     "min_probability": d.min_probability if d.rule == "probability" else None,
                     "text": RULE_TEXT[d.rule]},
        "measurement": measurement,
        "raw": {"file": raw_name, "sha256": raw_sha256},
        "software": {"name": SOFTWARE_NAME, "version": __version__},
    }
    doc.update(analysis_section(analysis))
    return json.loads(canonical_json(doc))


# --------------------------------------------------------------------------------------
# recompute
# --------------------------------------------------------------------------------------
def _compare(a, b, path: str, out: list[str], rtol: float = 1e-9, atol: float = 1e-12) -> None:
    if isinstance(a, dict) and isinstance(b, dict):
        for k in sorted(set(a) | set(b)):
            if k not in a or k not in b:
                out.append(f"{path}.{k}: present in only one of certificate / recomputation")
                continue
            _compare(a[k], b[k], f"{path}.{k}", out, rtol, atol)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            out.append(f"{path}: {len(a)} items in the certificate, {len(b)} recomputed")
            return
        for i, (x, y) in enumerate(zip(a, b)):
            _compare(x, y, f"{path}[{i}]", out, rtol, atol)
    elif isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        if not math.isclose(float(a), float(b), rel_tol=rtol, abs_tol=atol):
            out.append(f"{path}: certificate {a!r}, recomputed {b!r}")
    elif a != b:
        out.append(f"{path}: certificate {a!r}, recomputed {b!r}")


def recompute(cert_path: str | Path, profile_path: str | Path | None = None) -> list[str]:
    """Repeat every computed figure of a certificate from its raw capture and profile.

    Checks the raw capture's SHA-256 and the profile's SHA-256 against the certificate,
    regenerates the stimulus plan from the profile and checks it equals the played
    stimulus, re-runs the analysis and compares every number. Returns the list of
    differences (empty when the certificate recomputes exactly).
    """
    from harness.stimulus import plan_for_profile

    cert_path = Path(cert_path)
    try:
        cert = json.loads(cert_path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(str(cert_path), None, "file not found") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(str(cert_path), None, f"not a certificate (bad JSON: {exc})") from None
    diffs: list[str] = []
    raw_path = cert_path.parent / cert["raw"]["file"]
    data = raw_path.read_bytes()
    if hashlib.sha256(data).hexdigest() != cert["raw"]["sha256"]:
        diffs.append(f"raw: SHA-256 of {raw_path.name} does not match the certificate")
        return diffs
    if profile_path is None:
        profile_path = cert_path.parent / cert["profile"]["file"]
    profile = load_profile(profile_path)
    if profile.sha256 != cert["profile"]["sha256"]:
        diffs.append(f"profile: SHA-256 of {profile_path} does not match the certificate")
        return diffs
    stim, cap, plan_info, cal = read_raw(data)
    plan = plan_for_profile(profile, cap.sample_rate_hz)
    if stimulus_sha256(plan.signal()) != stim:
        diffs.append("stimulus: the profile's plan no longer generates the played stimulus")
        return diffs
    facts = StationFacts.from_dict(cert["station"]["facts"])
    a = analyze(profile, plan, cap, facts, cal)
    again = json.loads(canonical_json(analysis_section(a)))
    # the statement depends only on profile + analysis
    again["statement"] = conformity_statement(profile, a)
    mine = {k: cert.get(k) for k in again}
    _compare(mine, again, "certificate", diffs)
    return diffs


# --------------------------------------------------------------------------------------
# HTML
# --------------------------------------------------------------------------------------
_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;margin:2em auto;max-width:62em;color:#1d2430;line-height:1.4}
h1{font-size:1.3em;margin:0 0 .2em 0} h2{font-size:1.05em;margin:1.6em 0 .4em 0;border-bottom:1px solid #ccd3dd;padding-bottom:.2em}
.verdict{font-size:2.6em;font-weight:800;letter-spacing:.04em;padding:.25em .6em;border-radius:.25em;display:inline-block;margin:.3em 0}
.v-pass{background:#d9f2e3;color:#0b5a2a;border:3px solid #0b5a2a}
.v-fail{background:#fbe0dc;color:#8c1c10;border:3px solid #8c1c10}
.v-inconclusive{background:#fff1c7;color:#6b4e00;border:3px solid #6b4e00}
.v-invalid{background:#e6e6ee;color:#2f2f55;border:3px dashed #2f2f55}
table{border-collapse:collapse;font-size:.86em;margin:.3em 0} td,th{padding:.18em .6em;border-bottom:1px solid #e3e7ee;text-align:right}
th{background:#f2f4f8} td.l,th.l{text-align:left}
.kv td{text-align:left;border:none;padding:.08em .8em .08em 0} .kv td:first-child{color:#5a6578}
.small{font-size:.8em;color:#5a6578} .mono{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.85em;word-break:break-all}
.p-fail{color:#8c1c10;font-weight:700} .p-inconclusive{color:#6b4e00;font-weight:700} .p-invalid{color:#2f2f55;font-weight:700}
img{max-width:100%;border:1px solid #e3e7ee}
"""


def _fmt(x, spec: str = ".3f", none: str = "—") -> str:
    return none if x is None else format(x, spec)


def render_html(doc: dict, plot_png: bytes | None = None) -> str:
    """A self-contained HTML page for a certificate (plot embedded as PNG)."""
    e = html.escape
    v = doc["verdict"]
    u = doc["unit"]
    st = doc["station"]
    cal = st.get("calibration") or {}
    rows_kv = [
        ("Serial number", u.get("serial")), ("Model", u.get("model")), ("Firmware", u.get("firmware")),
        ("Specification", f"{doc['profile']['id']} rev {doc['profile']['revision'] or '-'} — {doc['profile']['title']}"),
        ("Station", st.get("id")), ("Backend", st.get("backend")),
        ("Calibration", f"{cal.get('id')} (due {cal.get('due_utc')})" if cal else "reference channel (no chain calibration needed)"),
        ("Decision rule", doc["decision"]["text"]), ("Coverage probability", doc["decision"]["confidence"]),
        ("Issued (UTC)", doc["issued_utc"]), ("Certificate id", doc["id"]),
    ]
    kv = "".join(f"<tr><td>{e(str(k))}</td><td>{e(str(x)) if x is not None else '—'}</td></tr>" for k, x in rows_kv)
    reasons = "".join(f"<li>{e(r)}</li>" for r in doc["reasons"])
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>Certificate {e(u.get('serial', ''))} — "
             f"{e(v.upper())}</title><style>{_CSS}</style></head><body>",
             f"<h1>Filter compliance certificate</h1><div class='small'>{e(doc['software']['name'])} "
             f"{e(doc['software']['version'])}</div>",
             f"<div class='verdict v-{e(v)}'>{e(v.upper())}</div>",
             f"<p><b>{e(doc['statement'])}</b></p><ul>{reasons}</ul>",
             f"<table class='kv'>{kv}</table>"]
    if plot_png:
        parts.append("<h2>Measured response and tolerance mask</h2>"
                     f"<img alt='Bode plot with mask' src='data:image/png;base64,{base64.b64encode(plot_png).decode()}'>"
                     "<div class='small'>Shaded: allowed region; hatched: forbidden region; bars: expanded "
                     "uncertainty U of each point.</div>")
    if doc.get("bands"):
        parts.append("<h2>Bands</h2><table><tr><th>#</th><th class='l'>kind</th><th class='l'>label</th><th>from Hz</th>"
                     "<th>to Hz</th><th>points</th><th>worst margin dB</th><th>at Hz</th><th>U dB</th><th class='l'>verdict</th></tr>")
        for b in doc["bands"]:
            parts.append(f"<tr><td>{b['index']}</td><td class='l'>{e(b['kind'])}</td><td class='l'>{e(b.get('label') or '')}</td>"
                         f"<td>{b['start_hz']:g}</td><td>{b['stop_hz']:g}</td><td>{b['points']}</td>"
                         f"<td>{_fmt(b.get('worst_margin_db'))}</td><td>{_fmt(b.get('worst_frequency_hz'), 'g')}</td>"
                         f"<td>{_fmt(b.get('U_gain_db'))}</td><td class='l p-{e(b['verdict'])}'>{e(b['verdict'])}</td></tr>")
        parts.append("</table>")
    pts = doc.get("points") or []
    if pts:
        worst = sorted([p for p in pts if p["margin_db"] is not None], key=lambda p: p["margin_db"])[:5]
        parts.append("<h2>Worst points</h2>" + _points_table(worst))
    pc = doc.get("phase_check")
    if pc:
        line = f"Phase rule: {e(pc['description'])} — <b class='p-{e(pc['verdict'])}'>{e(pc['verdict'])}</b>"
        if pc.get("worst"):
            line += f"; largest deviation {pc['worst']['deviation_deg']:+.2f}° at {pc['worst']['frequency_hz']:g} Hz"
        parts.append(f"<h2>Phase</h2><p>{line}</p>")
    resp = doc.get("response") or {}
    meas = doc.get("measurement") or {}
    est = doc.get("estimate") or {}

    def num(x, fmt):
        return "—" if x is None else format(x, fmt)

    mrows = [
        ("method", meas.get("method")),
        ("stimulus duration", f"{num(meas.get('duration_s'), '.3f')} s"),
        ("stimulus peak level", f"{num(meas.get('level_dbfs'), '.1f')} dBFS"),
        ("crest factor", f"{num(meas.get('crest_factor'), '.2f')}"),
        ("samples captured", meas.get("capture_samples")),
        ("frequencies not covered", ", ".join(f"{f:g} Hz" for f in meas.get("frequencies_not_covered_hz") or [])
         or "none"),
        ("bulk delay", f"{num(None if resp.get('delay_s') is None else resp['delay_s'] * 1e3, '.5f')} ms "
                       f"(u = {num(None if resp.get('u_delay_s') is None else resp['u_delay_s'] * 1e6, '.3f')} µs)"),
        ("clock offset", f"{num(est.get('clock_offset_ppm'), '+.3f')} ppm "
                         f"(u = {num(est.get('u_clock_offset_ppm'), '.3f')} ppm)"),
        ("distortion (unexcited lines)", f"{num(est.get('distortion_db') if isinstance(est.get('distortion_db'), float) else None, '.1f')} dB"),
    ]
    parts.append("<h2>Measurement</h2><table class='kv'>" + "".join(
        f"<tr><td>{e(str(k))}</td><td>{e(str(x))}</td></tr>" for k, x in mrows) + "</table>")
    if resp.get("notes"):
        parts.append("<ul class='small'>" + "".join(f"<li>{e(n)}</li>" for n in resp["notes"]) + "</ul>")
    bud = (doc.get("budget") or {}).get("gain")
    if bud:
        parts.append("<h2>Uncertainty budget (gain)</h2><p class='small'>" + e(bud["method"]) + "</p>"
                     "<table><tr><th class='l'>component</th><th class='l'>type</th><th>u (dB)</th><th>dof</th>"
                     "<th class='l'>source</th></tr>")
        for c in bud["components"]:
            uu = c["u"]
            ushow = f"{uu:.4f}" if isinstance(uu, float) else f"{min(uu):.4f} … {max(uu):.4f}"
            dd = c["dof"]
            dshow = "∞" if dd is None else (f"{dd:g}" if not isinstance(dd, list) else "per point")
            parts.append(f"<tr><td class='l'>{e(c['name'])}</td><td class='l'>{e(c['type'])}</td><td>{ushow}</td>"
                         f"<td>{dshow}</td><td class='l'>{e(c['source'])}{(' — ' + e(c['note'])) if c['note'] else ''}</td></tr>")
        parts.append("</table>")
        pb = (doc.get("budget") or {}).get("phase")
        if pb:
            parts.append("<p class='small'>Phase: " + "; ".join(
                f"{e(c['name'])} ({e(c['type'])})" for c in pb["components"]) + ".</p>")
    if pts:
        parts.append("<h2>All points</h2>" + _points_table(pts))
    sig = doc.get("signature")
    if isinstance(sig, dict):
        parts.append(f"<h2>Signature</h2><p class='small'>Signed with {e(str(sig.get('algorithm')))}, station key "
                     f"fingerprint <span class='mono'>{e(str(sig.get('public_key_fingerprint')))}</span> (SHA-256 of "
                     "the raw public key). Check it with <span class='mono'>harness verify CERT.json --key "
                     "STATION.pub</span>; this page itself is not signed, the JSON certificate is.</p>")
    parts.append(f"<h2>Records</h2><p class='small'>Raw capture <span class='mono'>{e(doc['raw']['file'])}</span>, "
                 f"SHA-256 <span class='mono'>{e(doc['raw']['sha256'])}</span>. Profile SHA-256 "
                 f"<span class='mono'>{e(str(doc['profile']['sha256']))}</span>. Every figure above can be recomputed "
                 "from the raw capture and the profile (<span class='mono'>harness recompute CERT.json</span>).</p>")
    parts.append("</body></html>")
    return "\n".join(parts)


def _points_table(pts: list[dict]) -> str:
    e = html.escape
    head = ("<table><tr><th>f (Hz)</th><th>gain dB</th><th>U dB</th><th>low dB</th><th>high dB</th><th>margin dB</th>"
            "<th>phase °</th><th>U °</th><th>SNR dB</th><th class='l'>verdict</th></tr>")
    rows = []
    for p in pts:
        rows.append(f"<tr><td>{p['frequency_hz']:.6g}</td><td>{_fmt(p['gain_db'], '+.3f')}</td><td>{_fmt(p['U_gain_db'])}</td>"
                    f"<td>{_fmt(p['limit_low_db'], '+.2f')}</td><td>{_fmt(p['limit_high_db'], '+.2f')}</td>"
                    f"<td>{_fmt(p['margin_db'], '+.3f')}</td><td>{_fmt(p['phase_deg'], '+.2f')}</td>"
                    f"<td>{_fmt(p['U_phase_deg'], '.2f')}</td><td>{_fmt(p['snr_db'], '.1f')}</td>"
                    f"<td class='l p-{e(p['verdict'])}'>{e(p['outcome'])}</td></tr>")
    return head + "".join(rows) + "</table>"
