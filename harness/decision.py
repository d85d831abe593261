"""Decision rules for conformity statements, per point and overall.

Rules (the profile's ``[decision].rule``):

``simple``
    Simple acceptance, ILAC-G8:09/2019 section 4.2.1: guard band w = 0. Inside the
    tolerance limits passes, outside fails.
``guarded``
    Guarded acceptance with w = U (ILAC-G8:09/2019 4.2.2 and its non-binary statements,
    4.2.3): the acceptance zone is the tolerance zone shrunk by the expanded uncertainty U
    on each side that has a limit. A result within U of a limit is a *conditional pass*
    (inside the tolerance limit) or a *conditional fail* (outside it); the harness
    reports both as ``inconclusive`` and keeps the conditional outcome in the detail.
    Beyond U outside the limit is ``fail``.
``probability``
    Probability of conformance, JCGM 106:2012 section 7: with the measured value y and
    standard uncertainty u, p_c = F((T_U - y)/u) - F((T_L - y)/u), where F is the
    standard normal CDF (JCGM 106 eq. for a normal PDF) or, for finite effective
    degrees of freedom, the Student-t CDF with nu_eff (the scaled-and-shifted t PDF
    of JCGM 101 6.4.9, a choice of this harness that widens the PDF honestly when the
    Type A part rests on few periods). ``pass`` when p_c >= p_min, ``fail`` when
    p_c <= 1 - p_min, otherwise ``inconclusive``.

Overall verdict: ``invalid`` if any point is invalid, else ``fail`` if any point fails,
else ``inconclusive`` if any point is inconclusive, else ``pass``. A unit that was not
measured properly is never passed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

VERDICTS = ("pass", "fail", "inconclusive", "invalid")
RULE_TEXT = {
    "simple": "simple acceptance, guard band w = 0 (ILAC-G8:09/2019 4.2.1)",
    "guarded": "guarded acceptance, guard band w = U (ILAC-G8:09/2019 4.2.2); results within U "
               "of a limit are reported inconclusive (ILAC-G8 4.2.3 conditional pass / conditional fail)",
    "probability": "probability of conformance (JCGM 106:2012 7.3)",
}


@dataclass
class PointDecision:
    verdict: np.ndarray        # str per point: pass | fail | inconclusive | invalid | none
    outcome: np.ndarray        # finer statement: pass, conditional pass, conditional fail, fail, ...
    probability: np.ndarray    # probability of conformance (NaN unless computed)


def probability_of_conformance(y, u, low, high, dof=None) -> np.ndarray:
    """Probability that the true value lies within ``[low, high]`` (JCGM 106:2012 7.3).

    ``p_c = F((high - y)/u) - F((low - y)/u)`` with F the standard normal CDF, or the
    Student-t CDF with `dof` degrees of freedom where `dof` is finite. Infinite limits
    contribute 1 or 0 as appropriate. ``u = 0`` gives 1 inside and 0 outside.
    """
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    lo = np.asarray(low, dtype=float)
    hi = np.asarray(high, dtype=float)
    nu = np.full(np.broadcast(y, u).shape, np.inf) if dof is None else np.asarray(dof, dtype=float)
    y, u, lo, hi, nu = np.broadcast_arrays(y, u, lo, hi, nu)

    def cdf(z, nu_):
        z = np.asarray(z, dtype=float)
        out = stats.norm.cdf(z)
        fin = np.isfinite(nu_)
        if np.any(fin):
            out = np.where(fin, stats.t.cdf(z, np.where(fin, nu_, 1.0)), out)
        return out

    with np.errstate(divide="ignore", invalid="ignore"):
        safe_u = np.where(u > 0, u, 1.0)
        z_hi = np.where(np.isfinite(hi), (hi - y) / safe_u, np.inf)
        z_lo = np.where(np.isfinite(lo), (lo - y) / safe_u, -np.inf)
    p = cdf(z_hi, nu) - cdf(z_lo, nu)
    exact = (y >= lo) & (y <= hi)
    return np.where(u > 0, p, exact.astype(float))


def decide(y, low, high, *, rule: str, expanded=None, u=None, dof=None,
           min_probability: float = 0.95, valid=None) -> PointDecision:
    """Per-point decision.

    Parameters
    ----------
    y : array_like
        Measured values (gain in dB, or |phase deviation| in deg ...).
    low, high : array_like
        Tolerance limits; -inf / +inf where a side has no limit; both infinite means
        no requirement at that point (verdict ``none``).
    rule : {"simple", "guarded", "probability"}
    expanded : array_like
        Expanded uncertainty U (needed by ``guarded``).
    u, dof : array_like
        Standard uncertainty and effective dof (needed by ``probability``).
    min_probability : float
        Required probability of conformance for ``probability``.
    valid : array_like of bool, optional
        Points measured properly; others are ``invalid`` whatever their value.
    """
    y = np.asarray(y, dtype=float)
    lo = np.broadcast_to(np.asarray(low, dtype=float), y.shape)
    hi = np.broadcast_to(np.asarray(high, dtype=float), y.shape)
    n = y.shape
    verdict = np.full(n, "pass", dtype=object)
    outcome = np.full(n, "pass", dtype=object)
    prob = np.full(n, np.nan)
    none = ~np.isfinite(lo) & ~np.isfinite(hi)
    inside = (y >= lo) & (y <= hi)

    if rule == "simple":
        verdict[~inside] = "fail"
        outcome[~inside] = "fail"
    elif rule == "guarded":
        if expanded is None:
            raise ValueError("guarded acceptance needs the expanded uncertainty")
        w = np.broadcast_to(np.asarray(expanded, dtype=float), y.shape)
        acc_lo = np.where(np.isfinite(lo), lo + w, -np.inf)
        acc_hi = np.where(np.isfinite(hi), hi - w, np.inf)
        rej_lo = np.where(np.isfinite(lo), lo - w, -np.inf)
        rej_hi = np.where(np.isfinite(hi), hi + w, np.inf)
        accepted = (y >= acc_lo) & (y <= acc_hi)
        rejected = (y < rej_lo) | (y > rej_hi)
        cond_pass = inside & ~accepted
        cond_fail = ~inside & ~rejected
        verdict[cond_pass | cond_fail] = "inconclusive"
        outcome[cond_pass] = "conditional pass"
        outcome[cond_fail] = "conditional fail"
        verdict[rejected] = "fail"
        outcome[rejected] = "fail"
    elif rule == "probability":
        if u is None:
            raise ValueError("the probability rule needs the standard uncertainty")
        prob = probability_of_conformance(y, u, lo, hi, dof)
        passed = prob >= min_probability
        failed = prob <= 1.0 - min_probability
        verdict[:] = "inconclusive"
        outcome[:] = "inconclusive"
        verdict[passed] = "pass"
        outcome[passed] = "pass"
        verdict[failed] = "fail"
        outcome[failed] = "fail"
    else:
        raise ValueError(f"unknown decision rule {rule!r}")

    verdict[none] = "none"
    outcome[none] = "no requirement"
    if valid is not None:
        bad = ~np.asarray(valid, dtype=bool)
        verdict[bad] = "invalid"
        outcome[bad] = "invalid"
    return PointDecision(verdict, outcome, prob)


def overall(verdicts) -> str:
    """Overall verdict from per-point verdicts (see module docstring)."""
    v = set(np.asarray(verdicts, dtype=object).ravel().tolist())
    for word in ("invalid", "fail", "inconclusive"):
        if word in v:
            return word
    return "pass"
