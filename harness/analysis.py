"""From a capture to a verdict: estimation, uncertainty budget, mask evaluation and
decision, as one pure function (`analyze`).

Everything a certificate states is computed here from (profile, plan, capture,
station facts, optional chain calibration), so `harness.certificate.recompute` can
repeat it from the stored raw capture and compare figure by figure.

Bulk delay: the estimator reports the device's bulk delay (``delay_s``). The response
``h`` keeps it; the phase reported per point (``phase_deg``) is the phase with the bulk
delay removed, ``angle(h * exp(+j 2 pi f delay_s))``, so a board's pipeline latency
does not wrap the phase many times between grid points. The linear-phase rule is
indifferent to a pure delay; the zero-phase and limit-line rules see the phase with the
delay removed; a group-delay limit sees the full group delay (removed delay added back).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from harness import decision as dec
from harness.errors import InvalidMeasurement
from harness.mask import Mask, margin
from harness.profile import Profile
from harness.uncertainty import Budget, TypeB, gain_budget, phase_budget


@dataclass(frozen=True)
class StationFacts:
    """What the analysis needs to know about the station (stored in each certificate)."""

    id: str
    reference_channel: bool
    type_b: TypeB
    min_snr_db: float = 20.0

    def to_dict(self) -> dict:
        return {"id": self.id, "reference_channel": self.reference_channel,
                "type_b": {"level_db": self.type_b.level_db, "flatness_db": self.type_b.flatness_db,
                           "phase_deg": self.type_b.phase_deg},
                "min_snr_db": self.min_snr_db}

    @classmethod
    def from_dict(cls, d: dict) -> "StationFacts":
        tb = d.get("type_b", {})
        return cls(id=d["id"], reference_channel=bool(d["reference_channel"]),
                   type_b=TypeB(float(tb.get("level_db", 0.0)), float(tb.get("flatness_db", 0.0)),
                                float(tb.get("phase_deg", 0.0))),
                   min_snr_db=float(d.get("min_snr_db", 20.0)))


@dataclass
class ChainCalibration:
    """A stored chain response (loopback) the response is divided by when the station
    has no reference channel. Arrays on the calibration's own frequency grid."""

    freq_hz: np.ndarray
    h: np.ndarray
    u_gain_db: np.ndarray
    u_phase_deg: np.ndarray
    dof: np.ndarray
    id: str = ""

    def delay_s(self) -> float:
        """Bulk delay of the chain (s): the weighted straight line through its phase
        (tracked unwrapping, as the estimator fits a device's delay). A stream latency of
        hundreds of samples turns the phase many times between calibration points; it
        is taken out before interpolating and put back after."""
        from harness.estimate import _fit_delay

        w = 2 * np.pi * np.asarray(self.freq_hz, dtype=float)
        u = np.radians(np.maximum(np.asarray(self.u_phase_deg, dtype=float), 1e-6))
        return float(_fit_delay(w, np.angle(self.h), u)[0]) if w.size >= 2 else 0.0

    def at(self, freq_hz) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Chain response and its uncertainty at `freq_hz`: magnitude (dB) and phase
        (bulk delay `delay_s` removed) interpolated linearly over log-frequency, the delay
        put back exactly; uncertainty from the larger neighbour."""
        f = np.asarray(freq_hz, dtype=float)
        lf, lq = np.log10(self.freq_hz), np.log10(f)
        if np.any(lq < lf[0] - 1e-9) or np.any(lq > lf[-1] + 1e-9):
            raise InvalidMeasurement(
                f"chain calibration {self.id or ''} covers {self.freq_hz[0]:g}..{self.freq_hz[-1]:g} Hz, "
                f"the measurement needs {f.min():g}..{f.max():g} Hz; calibrate over the full range")
        mag_db = np.interp(lq, lf, 20 * np.log10(np.abs(self.h)))
        d = self.delay_s()
        res = self.h * np.exp(2j * np.pi * self.freq_hz * d)
        ph = np.interp(lq, lf, np.unwrap(np.angle(res))) - 2 * np.pi * f * d
        idx = np.clip(np.searchsorted(lf, lq), 1, len(lf) - 1)
        ug = np.maximum(self.u_gain_db[idx - 1], self.u_gain_db[idx])
        up = np.maximum(self.u_phase_deg[idx - 1], self.u_phase_deg[idx])
        dof = np.minimum(self.dof[idx - 1], self.dof[idx])
        return 10 ** (mag_db / 20) * np.exp(1j * ph), ug, up, dof


@dataclass
class Analysis:
    """Result of `analyze`: per-point figures, budgets, decisions and the verdict."""

    verdict: str
    reasons: list[str]
    rule: str
    confidence: float
    freq_hz: np.ndarray = field(default_factory=lambda: np.zeros(0))
    h: np.ndarray = field(default_factory=lambda: np.zeros(0, complex))
    gain_db: np.ndarray = field(default_factory=lambda: np.zeros(0))       # as judged (relative if the mask is)
    phase_deg: np.ndarray = field(default_factory=lambda: np.zeros(0))     # bulk delay removed
    delay_s: float = 0.0
    u_delay_s: float = float("nan")
    gain: Budget | None = None
    phase: Budget | None = None
    low_db: np.ndarray = field(default_factory=lambda: np.zeros(0))
    high_db: np.ndarray = field(default_factory=lambda: np.zeros(0))
    margin_db: np.ndarray = field(default_factory=lambda: np.zeros(0))
    point_verdict: np.ndarray = field(default_factory=lambda: np.zeros(0, object))
    point_outcome: np.ndarray = field(default_factory=lambda: np.zeros(0, object))
    probability: np.ndarray = field(default_factory=lambda: np.zeros(0))
    snr_db: np.ndarray = field(default_factory=lambda: np.zeros(0))
    point_notes: list[str] = field(default_factory=list)
    phase_check: dict | None = None
    bands: list[dict] = field(default_factory=list)
    estimate: dict = field(default_factory=dict)
    reference_index: int | None = None

    @property
    def worst_index(self) -> int | None:
        m = np.where(np.isnan(self.margin_db), np.inf, self.margin_db)
        if not m.size or np.all(np.isnan(self.margin_db)):
            return None
        return int(np.argmin(m))


def _reference_index(mask: Mask, freq_hz: np.ndarray) -> int | None:
    if mask.reference_hz is None:
        return None
    i = int(np.argmin(np.abs(np.log(freq_hz / mask.reference_hz))))
    if abs(freq_hz[i] / mask.reference_hz - 1.0) > 0.02:
        raise InvalidMeasurement(f"the plan measured no point near the reference frequency "
                                 f"{mask.reference_hz:g} Hz (nearest {freq_hz[i]:g} Hz)")
    return i


def estimate_response(plan, capture):
    """Run the estimator that matches the plan (multitone or stepped sine)."""
    from harness import estimate as est

    if getattr(plan, "method", None) == "stepped-sine" or type(plan).__name__ == "SteppedSinePlan":
        return est.estimate_stepped_sine(plan, capture)
    return est.estimate_multitone(plan, capture)


def analyze(profile: Profile, plan, capture, station: StationFacts,
            calibration: ChainCalibration | None = None) -> Analysis:
    """Estimate, budget, evaluate and decide. Never raises for a bad measurement: an
    invalid capture gives an Analysis with verdict ``invalid`` and the reason."""
    d = profile.decision
    try:
        est = estimate_response(plan, capture)
    except InvalidMeasurement as exc:
        return Analysis("invalid", [exc.reason], d.rule, d.confidence)
    try:
        a = _analyze_estimate(profile, est, station, calibration, phase_not_assessed(station, capture))
    except InvalidMeasurement as exc:
        return Analysis("invalid", [exc.reason], d.rule, d.confidence, estimate=_est_dict(est))
    golden = (getattr(capture, "metadata", None) or {}).get("golden")
    if golden:                      # golden-unit check (harness.golden), stored with the capture
        from harness.golden import apply_golden

        apply_golden(a, golden)
    return a


def phase_not_assessed(station: StationFacts, capture) -> str | None:
    """Why the phase rules cannot be judged from this capture (None: they can).

    With a reference channel the chain's latency cancels in the ratio. Without one the
    response is divided by a chain calibration, whose phase includes the stream latency
    of the session it was made in; the phase is the board's only when the latency was the
    same: the calibration was made in the same stream session (capture metadata
    ``stream_session`` equals ``calibration_stream_session``) or the backend states that
    its latency is known (``latency_known``; a backend that does not say, such as the
    simulated one with its fixed latency, counts as known). Gains are unaffected.
    """
    if station.reference_channel:
        return None
    md = getattr(capture, "metadata", None) or {}
    if md.get("latency_known", True):
        return None
    session = md.get("stream_session")
    if session and session == md.get("calibration_stream_session"):
        return None
    return ("phase not assessed: the station has no reference channel and the chain calibration was not made in "
            "this stream session, so the stream latency (and with it the phase) may differ; gains are not "
            "affected. Calibrate in the same session, use a reference input, or declare latency_known")


def _est_dict(est) -> dict:
    try:
        return est.to_dict()
    except Exception:  # pragma: no cover - estimator without to_dict
        return {}


def _analyze_estimate(profile: Profile, est, station: StationFacts,
                      calibration: ChainCalibration | None, phase_note: str | None = None) -> Analysis:
    mask = profile.mask
    d = profile.decision
    f = np.asarray(est.freq_hz, dtype=float)
    h = np.asarray(est.h, dtype=complex)
    ua_gain = np.asarray(est.u_gain_db, dtype=float)
    ua_phase = np.asarray(est.u_phase_deg, dtype=float)
    dof = np.asarray(est.dof, dtype=float)
    snr = np.asarray(est.snr_db, dtype=float)
    valid = np.asarray(est.valid, dtype=bool).copy()
    reasons: list[str] = []
    notes: list[str] = list(getattr(est, "notes", []) or [])

    cal_ug = cal_up = cal_dof = None
    if not station.reference_channel:
        if calibration is None:
            raise InvalidMeasurement("the station has no reference channel and no chain calibration was given")
        c_h, cal_ug, cal_up, cal_dof = calibration.at(f)
        h = h / c_h

    delay_s = float(getattr(est, "delay_s", 0.0) or 0.0)
    if calibration is not None and not station.reference_channel:
        delay_s -= calibration.delay_s()          # the chain's delay went out with the division
    u_delay = float(getattr(est, "u_delay_s", float("nan")))
    ref_i = _reference_index(mask, f)

    g_budget = gain_budget(ua_gain, dof, station.type_b, confidence=d.confidence,
                           reference_index=ref_i, cal_u_gain_db=cal_ug, cal_dof=cal_dof)
    p_budget = phase_budget(ua_phase, dof, station.type_b, confidence=d.confidence,
                            cal_u_phase_deg=cal_up, cal_dof=cal_dof)

    with np.errstate(divide="ignore"):
        gain_abs_db = 20 * np.log10(np.abs(h))
    gain_db = gain_abs_db - (gain_abs_db[ref_i] if ref_i is not None else 0.0)
    phase_deg = np.degrees(np.angle(h * np.exp(2j * np.pi * f * delay_s)))

    low, high = mask.limits(f)

    # Stop-band points lost in the noise. Where only a ceiling applies and the response
    # is at or near the noise (below the station's minimum SNR, or marked invalid by the
    # estimator for noise alone), the point is judged on an upper bound of the gain:
    # |H| + 3 sigma, with sigma the noise floor there (the amplitude the noise alone
    # gives a phasor), i.e. 20 lg(10^(g/20) + 3 * 10^(floor/20)). Its Type A scatter is
    # already inside the bound, so only the Type B part of U guards it.
    est_valid = np.asarray(est.valid, dtype=bool)
    why = list(getattr(est, "invalid_reason", None) or [None] * f.size)
    upper_only = ~np.isfinite(low) & np.isfinite(high)
    nf = np.asarray(getattr(est, "noise_floor_db", np.full(f.size, -np.inf)), dtype=float)
    nf_rel = nf - (gain_abs_db[ref_i] if ref_i is not None else 0.0)
    noise_limited = np.array([bool(r) and ("noise" in str(r).lower() or "snr" in str(r).lower()) for r in why])
    bounded = upper_only & (snr < station.min_snr_db) & (est_valid | noise_limited)
    if np.any(bounded):
        with np.errstate(divide="ignore", over="ignore"):
            bound_db = 20.0 * np.log10(10.0 ** (gain_db / 20.0) + 3.0 * 10.0 ** (nf_rel / 20.0))
        gain_db = np.where(bounded, bound_db, gain_db)
        notes.append(f"{int(bounded.sum())} stop-band point(s) lie at or below the noise floor; each is judged on "
                     "an upper bound of its gain (measured amplitude plus three times the noise there), which "
                     "can only overstate it")
    valid = est_valid | bounded
    unusable = ~valid & (np.isfinite(low) | np.isfinite(high))
    if np.any(unusable):
        j = np.flatnonzero(unusable)
        first = next((str(why[i]) for i in j if why[i]), "estimator marked points invalid")
        reasons.append(f"{j.size} point(s) not measured properly: {first}")
    valid |= ~(np.isfinite(low) | np.isfinite(high))     # no requirement there: nothing to judge
    # a floor (pass band) cannot be demonstrated from a noisy point: below the station's
    # minimum SNR such a point is not measured properly
    low_snr = (snr < station.min_snr_db) & np.isfinite(low) & valid
    if np.any(low_snr):
        j = np.flatnonzero(low_snr)
        valid &= ~low_snr
        reasons.append(f"signal-to-noise ratio below {station.min_snr_db:g} dB at {j.size} point(s) with a gain "
                       f"floor (worst {snr[j].min():.1f} dB at {f[j[np.argmin(snr[j])]]:g} Hz)")
    marg = margin(gain_db, low, high)

    U = g_budget.expanded
    u_b = np.sqrt(np.sum([c.u ** 2 for c in g_budget.components if c.kind == "B"], axis=0)) \
        if any(c.kind == "B" for c in g_budget.components) else np.zeros(f.size)
    U_dec = np.where(bounded, 2.0 * u_b, U)             # bounded points: Type B only (see above)
    u_dec = np.where(bounded, u_b, g_budget.u_c)
    nu_dec = np.where(bounded, np.inf, g_budget.nu_eff)
    pd = dec.decide(gain_db, low, high, rule=d.rule, expanded=U_dec, u=u_dec, dof=nu_dec,
                    min_probability=d.min_probability, valid=valid)
    outcome_bound = [" (upper bound, below noise)" if b else "" for b in bounded]
    verdicts = list(pd.verdict)

    phase_check = None
    if mask.phase.active and phase_note:
        phase_check = {"rule": mask.phase.rule, "description": mask.phase.describe(), "assessed": False,
                       "verdict": "not assessed", "verdicts": [], "reason": "", "note": phase_note}
    elif mask.phase.active:
        phase_check = _phase_decision(profile, f, h, delay_s, p_budget, valid)
        verdicts += phase_check["verdicts"]

    verdict = dec.overall(verdicts)
    if verdict == "fail":
        j = [i for i, v in enumerate(pd.verdict) if v == "fail"]
        if j:
            w = j[int(np.argmin(marg[j]))]
            reasons.append(f"gain {gain_db[w]:+.3f} dB at {f[w]:g} Hz is outside the mask by "
                           f"{-marg[w]:.3f} dB (limits {_fmt_lim(low[w], high[w])})")
    if verdict == "inconclusive":
        j = [i for i, v in enumerate(pd.verdict) if v == "inconclusive"]
        if j:
            w = j[int(np.argmin(np.abs(marg[j])))]
            reasons.append(f"gain {gain_db[w]:+.3f} dB at {f[w]:g} Hz lies within the expanded uncertainty "
                           f"U = {U[w]:.3f} dB of a limit ({pd.outcome[w]})")
    if phase_check and phase_check["reason"]:
        reasons.append(phase_check["reason"])
    if verdict == "pass" and not reasons:
        reasons.append("every point meets the mask under the stated decision rule")
    if phase_check and phase_check.get("note"):
        reasons.append(phase_check["note"])

    bands = []
    for i, b in enumerate(mask.bands):
        inside = b.covers(f)
        if not np.any(inside):
            bands.append({"index": i, "kind": b.kind, "label": b.label, "start_hz": b.start_hz,
                          "stop_hz": b.stop_hz, "points": 0, "verdict": "not measured"})
            continue
        lo_b, hi_b = b.limits_at(f)
        m_b = np.where(inside, margin(gain_db, lo_b, hi_b), np.nan)
        w = int(np.nanargmin(m_b))
        bands.append({"index": i, "kind": b.kind, "label": b.label, "start_hz": b.start_hz,
                      "stop_hz": b.stop_hz, "points": int(inside.sum()),
                      "worst_margin_db": float(m_b[w]), "worst_frequency_hz": float(f[w]),
                      "worst_gain_db": float(gain_db[w]), "U_gain_db": float(U[w]),
                      "verdict": dec.overall(pd.verdict[inside])})

    return Analysis(verdict, reasons, d.rule, d.confidence, freq_hz=f, h=h, gain_db=gain_db,
                    phase_deg=phase_deg, delay_s=delay_s, u_delay_s=u_delay, gain=g_budget,
                    phase=p_budget, low_db=low, high_db=high, margin_db=marg,
                    point_verdict=pd.verdict, point_outcome=np.array([o + b for o, b in zip(pd.outcome, outcome_bound)],
                                                                      dtype=object), probability=pd.probability,
                    snr_db=snr, point_notes=notes, phase_check=phase_check, bands=bands,
                    estimate=_est_dict(est), reference_index=ref_i)


def _fmt_lim(lo: float, hi: float) -> str:
    a = f"{lo:+.2f}" if np.isfinite(lo) else "-inf"
    b = f"{hi:+.2f}" if np.isfinite(hi) else "+inf"
    return f"{a} .. {b} dB"


def _phase_decision(profile: Profile, f, h, delay_s, p_budget: Budget, valid) -> dict:
    """Decide the phase rule and the group-delay limit with their uncertainty."""
    mask = profile.mask
    rule = mask.phase
    d = profile.decision
    # The linear rule is indifferent to a pure delay: judge the residual (bulk delay
    # removed), which unwraps safely on a sparse grid. The zero rule judges the full
    # response (its wrapped phase needs no unwrapping). The limit lines refer to the full
    # phase: unwrap the residual, then add the removed delay back exactly.
    h_res = h * np.exp(2j * np.pi * f * delay_s)
    ev = mask.evaluate(f, h if rule.rule == "zero" else h_res).phase
    if rule.rule == "limits":
        full = ev.deviation_deg - 360.0 * ev.freq_hz * delay_s
        if full.size:
            full = full - 360.0 * np.round((full[0] - (((full[0] + 180.0) % 360.0) - 180.0)) / 360.0)
        ev.deviation_deg = full
        ev.phase_deg = full
    sel = np.isin(f, ev.freq_hz)
    U = p_budget.expanded[sel]
    u = p_budget.u_c[sel]
    nu = p_budget.nu_eff[sel]
    v_ok = valid[sel]
    out = {"rule": rule.rule, "description": rule.describe(), "verdicts": [], "reason": "",
           "frequency_hz": [float(x) for x in ev.freq_hz]}
    if rule.rule in ("linear", "zero"):
        y = np.abs(ev.deviation_deg)
        pd = dec.decide(y, -np.inf, ev.limit_deg, rule=d.rule, expanded=U, u=u, dof=nu,
                        min_probability=d.min_probability, valid=v_ok)
        out.update(deviation_deg=[float(x) for x in ev.deviation_deg],
                   limit_deg=float(rule.max_deviation_deg), U_phase_deg=[float(x) for x in U],
                   point_verdict=[str(x) for x in pd.verdict], fitted_delay_s=ev.delay_s)
        out["verdicts"] += list(pd.verdict)
        worst = int(np.argmax(y)) if y.size else None
        if worst is not None:
            out["worst"] = {"frequency_hz": float(ev.freq_hz[worst]), "deviation_deg": float(ev.deviation_deg[worst])}
            if pd.verdict[worst] in ("fail", "inconclusive"):
                out["reason"] = (f"phase deviation {ev.deviation_deg[worst]:+.2f} deg at {ev.freq_hz[worst]:g} Hz "
                                 f"against {rule.max_deviation_deg:g} deg ({pd.outcome[worst]})")
    elif rule.rule == "limits":
        lo = rule.lower.at(ev.freq_hz) if rule.lower is not None else np.full(ev.freq_hz.shape, np.nan)
        hi = rule.upper.at(ev.freq_hz) if rule.upper is not None else np.full(ev.freq_hz.shape, np.nan)
        lo = np.where(np.isnan(lo), -np.inf, lo)
        hi = np.where(np.isnan(hi), np.inf, hi)
        pd = dec.decide(ev.deviation_deg, lo, hi, rule=d.rule, expanded=U, u=u, dof=nu,
                        min_probability=d.min_probability, valid=v_ok)
        out.update(phase_deg=[float(x) for x in ev.deviation_deg], U_phase_deg=[float(x) for x in U],
                   point_verdict=[str(x) for x in pd.verdict])
        out["verdicts"] += list(pd.verdict)
        bad = [i for i, v in enumerate(pd.verdict) if v in ("fail", "inconclusive")]
        if bad:
            i = bad[0]
            out["reason"] = f"phase {ev.deviation_deg[i]:+.2f} deg at {ev.freq_hz[i]:g} Hz vs its limit lines ({pd.outcome[i]})"
    if rule.max_group_delay_s is not None and ev.group_delay_s is not None:
        fp = f[mask.in_pass_band(f)]
        gd = ev.group_delay_s + delay_s
        # uncertainty of a central difference of two phase estimates (rad) over 2*pi*df
        up_rad = np.radians(p_budget.u_c[mask.in_pass_band(f)])
        Up_rad = np.radians(p_budget.expanded[mask.in_pass_band(f)])
        span = np.gradient(2 * np.pi * fp) * 2 if fp.size > 1 else np.array([np.inf])
        u_gd = np.sqrt(2) * up_rad / span
        U_gd = np.sqrt(2) * Up_rad / span
        pd = dec.decide(gd, -np.inf, rule.max_group_delay_s, rule=d.rule, expanded=U_gd, u=u_gd,
                        min_probability=d.min_probability, valid=valid[mask.in_pass_band(f)])
        out.update(group_delay_s=[float(x) for x in gd], U_group_delay_s=[float(x) for x in U_gd],
                   max_group_delay_s=rule.max_group_delay_s, group_delay_verdict=[str(x) for x in pd.verdict])
        out["verdicts"] += list(pd.verdict)
        bad = [i for i, v in enumerate(pd.verdict) if v in ("fail", "inconclusive")]
        if bad and not out["reason"]:
            i = bad[int(np.argmax(gd[bad]))]
            out["reason"] = (f"group delay {gd[i] * 1e3:.3f} ms at {fp[i]:g} Hz against "
                             f"{rule.max_group_delay_s * 1e3:g} ms ({pd.outcome[i]})")
    out["verdict"] = dec.overall(out["verdicts"]) if out["verdicts"] else "pass"
    out["verdicts"] = [str(v) for v in out["verdicts"]]
    return out
