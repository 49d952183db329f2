"""Toolkit checks against published or recalled values; each check names its source."""

import math

import numpy as np
import pytest
from scipy import stats

from stratagem.modify.evalue import evalue
from stratagem.modify.gail_simon import gail_simon, gail_simon_critical, gail_simon_pvalue


def test_evalue_worked_example():
    """from memory: VanderWeele & Ding 2017, Ann Intern Med 167:268, worked example (breastfeeding and
    infant death, Victora et al.): RR 3.9, 95% CI 1.8 to 8.7; E-values reported as 7.2 for the estimate
    and 3.0 for the lower limit. The formula gives 7.26 for 3.9, so the printed 7.2 is checked to 0.1."""
    r = evalue(3.9, 1.8, 8.7, measure="rr")
    assert r.estimate == pytest.approx(7.2, abs=0.1)
    assert r.ci == pytest.approx(3.0, abs=0.005)


def test_evalue_formula_arithmetic():
    """published: VanderWeele & Ding 2017, Ann Intern Med 167:268, main text formula
    E = RR + sqrt(RR (RR - 1)); for RR < 1 take 1/RR first."""
    for rr in (1.1, 1.5, 2.0, 3.9, 10.0):
        assert evalue(rr).estimate == pytest.approx(rr + math.sqrt(rr * (rr - 1)))
        assert evalue(1 / rr).estimate == pytest.approx(rr + math.sqrt(rr * (rr - 1)))


def test_gail_simon_critical_values():
    """from memory: Gail & Simon 1985, Biometrics 41:361, Table 1, critical values at alpha = 0.05 for
    I = 2, 3, 4, 5 subsets: 2.71, 4.23, 5.43, 6.50."""
    for k, c in zip((2, 3, 4, 5), (2.71, 4.23, 5.43, 6.50)):
        assert gail_simon_critical(k, 0.05) == pytest.approx(c, abs=0.006)


def test_gail_simon_two_strata_reduces_to_one_sided_tests():
    """common practice (no source): with two strata of opposite sign, min(Q-, Q+) is the smaller squared
    z, and the mixture null P = 0.5 P(chi2_1 > q) is the probability that both one-sided z-tests exceed
    it (one-sided normal p of the weaker stratum)."""
    theta = np.array([0.5, -0.3])
    se = np.array([0.2, 0.2])
    r = gail_simon(theta, se)
    q = (0.3 / 0.2) ** 2
    assert r.statistic == pytest.approx(q)
    assert r.p_value == pytest.approx(stats.norm.sf(1.5))
    assert gail_simon_pvalue(q, 2) == pytest.approx(0.5 * stats.chi2.sf(q, 1))
