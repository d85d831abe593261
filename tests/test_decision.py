"""Decision rules against ILAC-G8:09/2019 and JCGM 106:2012."""

import numpy as np
import pytest
from scipy import stats

from harness.decision import decide, overall, probability_of_conformance


def test_ilac_g8_guarded_false_accept_risk_at_acceptance_limit():
    # ILAC-G8:09/2019 (REFERENCES.md): with w = U, k = 2 and a normal PDF, the specific
    # false-accept risk at the acceptance limit is 1 - Phi(2) = 2.3 %.
    u = 0.1
    tl = 1.0
    y = tl - 2 * u  # the acceptance limit TL - w with w = U = 2u
    p_conform = probability_of_conformance(y, u, -np.inf, tl)
    assert 1.0 - p_conform == pytest.approx(0.02275, abs=5e-5)


def test_jcgm106_one_and_two_limits():
    # JCGM 106:2012 (REFERENCES.md): one upper limit p_c = Phi((T_U - y)/u);
    # two limits p_c = Phi((T_U - y)/u) - Phi((T_L - y)/u).
    assert probability_of_conformance(0.0, 1.0, -np.inf, 1.0) == pytest.approx(stats.norm.cdf(1.0))
    assert probability_of_conformance(0.0, 1.0, -2.0, 2.0) == pytest.approx(0.9545, abs=5e-5)
    # lower limit only
    assert probability_of_conformance(0.0, 1.0, -1.5, np.inf) == pytest.approx(stats.norm.cdf(1.5))
    # finite dof widens: p_c with a t(3) CDF (JCGM 101 6.4.9 scaled-shifted t)
    assert probability_of_conformance(0.0, 1.0, -np.inf, 2.0, dof=3) == pytest.approx(stats.t.cdf(2.0, 3))
    # zero uncertainty: indicator
    assert probability_of_conformance([0.0, 3.0], 0.0, -1.0, 1.0).tolist() == [1.0, 0.0]


def test_guarded_non_binary_outcomes():
    # ILAC-G8:09/2019 4.2.3: pass below TL - w, conditional pass in [TL - w, TL],
    # conditional fail in (TL, TL + w], fail above TL + w (here w = U = 0.2, TL = 1).
    y = np.array([0.5, 0.9, 1.1, 1.5])
    d = decide(y, -np.inf, 1.0, rule="guarded", expanded=0.2)
    assert d.verdict.tolist() == ["pass", "inconclusive", "inconclusive", "fail"]
    assert d.outcome.tolist() == ["pass", "conditional pass", "conditional fail", "fail"]
    # two-sided window: the same on the low side
    d2 = decide(np.array([-0.95, 0.0, 0.95]), -1.0, 1.0, rule="guarded", expanded=0.1)
    assert d2.verdict.tolist() == ["inconclusive", "pass", "inconclusive"]


def test_simple_acceptance_and_probability_rule():
    y = np.array([0.5, 0.99, 1.01])
    assert decide(y, -np.inf, 1.0, rule="simple").verdict.tolist() == ["pass", "pass", "fail"]
    # probability rule with p_min = 0.95: pass needs (TL - y)/u >= 1.645 (normal quantile)
    d = decide(np.array([0.0, 0.9, 2.0]), -np.inf, 1.0, rule="probability", u=np.array([0.5, 0.5, 0.5]),
               min_probability=0.95)
    assert d.verdict.tolist() == ["pass", "inconclusive", "fail"]
    assert d.probability[0] == pytest.approx(stats.norm.cdf(2.0))


def test_no_requirement_and_invalid_points_and_overall():
    d = decide(np.array([0.0, 5.0, 0.0]), np.array([-np.inf, -np.inf, -1.0]),
               np.array([np.inf, 1.0, 1.0]), rule="simple", valid=np.array([True, True, False]))
    assert d.verdict.tolist() == ["none", "fail", "invalid"]
    assert overall(d.verdict) == "invalid"
    assert overall(["pass", "none", "fail", "inconclusive"]) == "fail"
    assert overall(["pass", "inconclusive"]) == "inconclusive"
    assert overall(["pass", "none"]) == "pass"
