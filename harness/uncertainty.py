"""Measurement uncertainty per JCGM 100:2008 (GUM).

Per frequency point the combined standard uncertainty of gain (dB) and phase (deg) is
the root sum of squares of its components (all with unit sensitivity, uncorrelated
unless stated), the effective degrees of freedom follow Welch-Satterthwaite (GUM G.4.1)
and the coverage factor is the Student-t quantile at the requested coverage probability
(GUM G.3, Table G.2). Pure functions.

Components used by the harness (see `gain_budget` / `phase_budget`):

* Type A, from the period-to-period scatter of the estimate (dof from the estimator).
* Type A of the reference point, for gains relative to a reference frequency: the
  relative gain g(f) - g(f_ref) carries the reference point's scatter too (the two
  estimates come from independent noise on different bins, so they add in quadrature).
* Type B ``level_db`` (station level accuracy): a common gain error of the whole chain.
  It cancels exactly in gains relative to a reference frequency, and is then listed
  with the value 0 and the note "cancels".
* Type B ``flatness_db`` and ``phase_deg`` (station flatness / phase accuracy), dof
  infinite (GUM G.4.2: a Type B value taken as exactly known).
* Type B of a chain calibration (its own Type A scatter with its dof, plus its Type B),
  when the response is divided by a stored calibration instead of a reference channel.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

DB_PER_NEPER = 20.0 / np.log(10.0)  # 8.6859 dB per unit relative amplitude change


def coverage_factor(dof, confidence: float = 0.95) -> np.ndarray:
    """Coverage factor k for a two-sided interval of probability `confidence`.

    Student-t quantile ``t_{(1+p)/2}(nu)`` (JCGM 100:2008 G.3.4, Table G.2); infinite
    or very large dof give the normal quantile (1.960 for 95 %).
    """
    nu = np.asarray(dof, dtype=float)
    q = 0.5 * (1.0 + confidence)
    with np.errstate(invalid="ignore"):
        k_t = stats.t.ppf(q, np.where(np.isfinite(nu), nu, 1.0))
    return np.where(np.isfinite(nu), k_t, stats.norm.ppf(q))


def welch_satterthwaite(u_components, dof_components) -> np.ndarray:
    """Effective degrees of freedom ``nu_eff = u_c^4 / sum(u_i^4 / nu_i)`` (GUM G.4.1).

    Parameters
    ----------
    u_components : array_like, shape (m, n) or (m,)
        Standard uncertainties (already multiplied by their sensitivity) of m
        components at n points.
    dof_components : array_like, shape (m, n) or (m,)
        Their degrees of freedom; ``inf`` for components taken as exactly known.

    Returns
    -------
    ndarray, shape (n,) or scalar: nu_eff (``inf`` when every component has infinite
    dof or all uncertainties are zero).
    """
    u = np.asarray(u_components, dtype=float)
    nu = np.asarray(dof_components, dtype=float)
    u, nu = np.broadcast_arrays(u, nu)
    uc4 = np.sum(u ** 2, axis=0) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(np.isfinite(nu) & (u > 0), u ** 4 / nu, 0.0)
    denom = np.sum(terms, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(denom > 0, uc4 / np.where(denom > 0, denom, 1.0), np.inf)
    return out


@dataclass
class Component:
    """One line of an uncertainty budget: a standard uncertainty per point."""

    name: str
    kind: str               # "A" or "B"
    u: np.ndarray           # standard uncertainty per point (after sensitivity), in the budget's unit
    dof: np.ndarray         # degrees of freedom per point (inf for exactly known Type B)
    source: str = ""
    note: str = ""

    def to_dict(self) -> dict:
        u = np.asarray(self.u, dtype=float)
        dof = np.asarray(self.dof, dtype=float)
        same_u = bool(u.size and np.all(u == u.flat[0]))
        same_dof = bool(dof.size and np.all(dof == dof.flat[0]))
        return {
            "name": self.name,
            "type": self.kind,
            "source": self.source,
            "note": self.note,
            "u": float(u.flat[0]) if same_u else [float(x) for x in u],
            "dof": _dof_json(dof.flat[0]) if same_dof else [_dof_json(x) for x in dof],
        }


def _dof_json(x: float):
    return None if not np.isfinite(x) else float(x)


@dataclass
class Budget:
    """An uncertainty budget over n points for one quantity (gain in dB or phase in deg)."""

    quantity: str
    unit: str
    confidence: float
    components: list[Component] = field(default_factory=list)

    def add(self, name: str, kind: str, u, dof, n: int, source: str = "", note: str = "") -> None:
        u_arr = np.broadcast_to(np.asarray(u, dtype=float), (n,)).copy()
        dof_arr = np.broadcast_to(np.asarray(dof, dtype=float), (n,)).copy()
        self.components.append(Component(name, kind, u_arr, dof_arr, source, note))

    @property
    def u_c(self) -> np.ndarray:
        """Combined standard uncertainty per point (root sum of squares)."""
        return np.sqrt(np.sum([c.u ** 2 for c in self.components], axis=0))

    @property
    def nu_eff(self) -> np.ndarray:
        return welch_satterthwaite([c.u for c in self.components], [c.dof for c in self.components])

    @property
    def k(self) -> np.ndarray:
        return coverage_factor(self.nu_eff, self.confidence)

    @property
    def expanded(self) -> np.ndarray:
        """Expanded uncertainty ``U = k * u_c`` per point."""
        return self.k * self.u_c

    def to_dict(self) -> dict:
        return {
            "quantity": self.quantity,
            "unit": self.unit,
            "confidence": self.confidence,
            "method": "JCGM 100:2008 root-sum-of-squares, Welch-Satterthwaite nu_eff, Student-t k",
            "components": [c.to_dict() for c in self.components],
        }


@dataclass(frozen=True)
class TypeB:
    """Station Type B standard uncertainties (station file ``[station.type_b]``)."""

    level_db: float = 0.0
    flatness_db: float = 0.0
    phase_deg: float = 0.0


def gain_budget(u_gain_db_a, dof_a, type_b: TypeB, *, confidence: float = 0.95,
                reference_index: int | None = None, cal_u_gain_db=None, cal_dof=None) -> Budget:
    """Budget for gain in dB at n points.

    Parameters
    ----------
    u_gain_db_a, dof_a : array_like, shape (n,)
        Type A standard uncertainty of the gain (dB) and its dof at each point.
    type_b : TypeB
    confidence : float
        Coverage probability of the expanded uncertainty.
    reference_index : int, optional
        Index of the reference point when gains are relative to it: its Type A is added
        to every other point, the level term cancels, and the reference point's own
        relative gain (0 dB by definition) has no uncertainty from either.
    cal_u_gain_db, cal_dof : array_like, optional
        Standard uncertainty (dB) and dof of a chain calibration the response was
        divided by.
    """
    ua = np.asarray(u_gain_db_a, dtype=float)
    n = ua.size
    dof = np.asarray(dof_a, dtype=float)
    b = Budget("gain", "dB", confidence)
    if reference_index is None:
        b.add("repeatability", "A", ua, dof, n, "period-to-period scatter of the estimate")
        b.add("level accuracy", "B", type_b.level_db, np.inf, n, "station file [station.type_b].level_db")
    else:
        r = reference_index
        own = ua.copy()
        own[r] = 0.0
        ref = np.full(n, ua[r])
        ref[r] = 0.0
        b.add("repeatability", "A", own, dof, n, "period-to-period scatter of the estimate")
        b.add("repeatability at reference", "A", ref, np.full(n, dof[r]), n,
              "scatter of the reference-frequency point (gains are relative to it)")
        b.add("level accuracy", "B", 0.0, np.inf, n, "station file [station.type_b].level_db",
              note="cancels: gains are relative to the reference frequency")
    flat = np.full(n, type_b.flatness_db)
    if reference_index is not None:
        flat[reference_index] = 0.0
    b.add("flatness", "B", flat, np.inf, n, "station file [station.type_b].flatness_db")
    if cal_u_gain_db is not None:
        b.add("chain calibration", "B", cal_u_gain_db,
              np.inf if cal_dof is None else cal_dof, n, "stored chain calibration (loopback)")
    return b


def phase_budget(u_phase_deg_a, dof_a, type_b: TypeB, *, confidence: float = 0.95,
                 cal_u_phase_deg=None, cal_dof=None) -> Budget:
    """Budget for phase in degrees at n points (Type A, station phase accuracy, and a
    chain calibration when used)."""
    ua = np.asarray(u_phase_deg_a, dtype=float)
    n = ua.size
    b = Budget("phase", "deg", confidence)
    b.add("repeatability", "A", ua, dof_a, n, "period-to-period scatter of the estimate")
    b.add("phase accuracy", "B", type_b.phase_deg, np.inf, n, "station file [station.type_b].phase_deg")
    if cal_u_phase_deg is not None:
        b.add("chain calibration", "B", cal_u_phase_deg,
              np.inf if cal_dof is None else cal_dof, n, "stored chain calibration (loopback)")
    return b


def gain_phase_u_from_cov(h, cov_h) -> tuple[np.ndarray, np.ndarray]:
    """First-order (GUM 5.1.2) standard uncertainties of ``20 log10 |H|`` in dB and of
    ``angle(H)`` in degrees from the covariance of ``[Re H, Im H]``.

    With H = x + jy, |H| = r: d|H| = (x dx + y dy)/r, d(angle) = (x dy - y dx)/r^2.
    """
    h = np.asarray(h, dtype=complex)
    c = np.asarray(cov_h, dtype=float)
    x, y = h.real, h.imag
    r2 = np.maximum(x * x + y * y, np.finfo(float).tiny)
    var_mag = (x * x * c[..., 0, 0] + y * y * c[..., 1, 1] + 2 * x * y * c[..., 0, 1]) / r2
    var_ang = (y * y * c[..., 0, 0] + x * x * c[..., 1, 1] - 2 * x * y * c[..., 0, 1]) / (r2 * r2)
    u_gain_db = DB_PER_NEPER * np.sqrt(np.maximum(var_mag, 0.0) / r2)
    u_phase_deg = np.degrees(np.sqrt(np.maximum(var_ang, 0.0)))
    return u_gain_db, u_phase_deg
