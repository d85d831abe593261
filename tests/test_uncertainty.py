"""GUM uncertainty arithmetic against JCGM 100:2008 and its tables."""

import numpy as np
import pytest

from harness.uncertainty import (
    TypeB,
    coverage_factor,
    gain_budget,
    gain_phase_u_from_cov,
    phase_budget,
    welch_satterthwaite,
)

# JCGM 100:2008 Table G.2 (also NIST TN 1297 Table B.1), via REFERENCES.md:
# nu -> (k for 95 %, k for 95.45 %)
GUM_TABLE_G2 = {
    1: (12.71, 13.97),
    2: (4.30, 4.53),
    3: (3.18, 3.31),
    5: (2.57, 2.65),
    10: (2.23, 2.28),
    20: (2.09, 2.13),
    np.inf: (1.960, 2.000),
}


@pytest.mark.parametrize("nu", list(GUM_TABLE_G2))
def test_coverage_factor_matches_gum_table_g2(nu):
    k95, k9545 = GUM_TABLE_G2[nu]
    # the table is rounded to 2 decimals (3 for nu = inf)
    tol = 0.0006 if not np.isfinite(nu) else 0.006
    assert coverage_factor(nu, 0.95) == pytest.approx(k95, abs=tol)
    assert coverage_factor(nu, 0.9545) == pytest.approx(k9545, abs=tol)


def test_welch_satterthwaite_formula():
    # JCGM 100:2008 G.4.1, eq. (G.2b): nu_eff = u_c^4 / sum(u_i^4 / nu_i).
    # Two equal components with 10 dof each: (2u^2)^2 / (2 u^4 / 10) = 20 (textbook algebra).
    assert welch_satterthwaite([1.0, 1.0], [10, 10]) == pytest.approx(20.0)
    # A component with infinite dof contributes to u_c but not to the denominator:
    # u = (3, 4): u_c^2 = 25; nu_eff = 625 / (81/5) = 38.58 (computed by hand from G.2b).
    assert welch_satterthwaite([3.0, 4.0], [5, np.inf]) == pytest.approx(625 / (81 / 5))
    # all Type B exactly known -> infinite
    assert np.isinf(welch_satterthwaite([1.0, 2.0], [np.inf, np.inf]))
    # vectorised over points
    out = welch_satterthwaite(np.array([[1.0, 3.0], [1.0, 4.0]]), np.array([[10, 5], [10, np.inf]]))
    assert out == pytest.approx([20.0, 625 / (81 / 5)])


def test_gain_budget_absolute_and_relative():
    ua = np.array([0.01, 0.02, 0.03])
    dof = np.array([7, 7, 7])
    tb = TypeB(level_db=0.05, flatness_db=0.01, phase_deg=0.1)
    b = gain_budget(ua, dof, tb, confidence=0.95)
    assert b.u_c == pytest.approx(np.sqrt(ua ** 2 + 0.05 ** 2 + 0.01 ** 2))
    # relative to point 1: level cancels, reference scatter adds, reference point itself is exact
    r = gain_budget(ua, dof, tb, confidence=0.95, reference_index=1)
    expect = np.sqrt(ua ** 2 + 0.02 ** 2 + 0.01 ** 2)
    expect[1] = 0.0
    assert r.u_c == pytest.approx(expect)
    assert r.expanded[1] == 0.0
    # expanded = k(nu_eff) * u_c, k from the t distribution
    k = coverage_factor(r.nu_eff[0], 0.95)
    assert r.expanded[0] == pytest.approx(k * expect[0])
    d = r.to_dict()
    assert d["components"][2]["note"].startswith("cancels")


def test_phase_budget_and_type_a_dominance():
    # With Type A dominating and 3 dof, k approaches the t value for 3 dof (Table G.2: 3.18).
    b = phase_budget([1.0], [3], TypeB(phase_deg=1e-6))
    assert b.k[0] == pytest.approx(3.18, abs=0.01)


def test_gain_phase_u_from_cov_first_order():
    # GUM 5.1.2 first-order propagation; check against a Monte Carlo of the same
    # complex normal (JCGM 101 style cross-check, computed here).
    rng = np.random.default_rng(1)
    h = np.array([0.5 + 0.3j])
    cov = np.array([[[1e-6, 3e-7], [3e-7, 2e-6]]])
    ug, up = gain_phase_u_from_cov(h, cov)
    s = rng.multivariate_normal([h.real[0], h.imag[0]], cov[0], size=200_000)
    hs = s[:, 0] + 1j * s[:, 1]
    assert np.std(20 * np.log10(np.abs(hs))) == pytest.approx(ug[0], rel=0.02)
    assert np.std(np.degrees(np.angle(hs))) == pytest.approx(up[0], rel=0.02)
