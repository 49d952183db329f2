"""Gail-Simon statistic and p-value by hand."""

import numpy as np
import pytest
from scipy import stats

from stratagem.modify.gail_simon import gail_simon


def test_three_strata_by_hand():
    theta = np.array([0.4, -0.5, 0.1])
    se = np.array([0.1, 0.25, 0.1])
    r = gail_simon(theta, se)
    q_minus = 16.0 + 1.0  # positive estimates: (0.4/0.1)^2 + (0.1/0.1)^2
    q_plus = 4.0  # negative estimate: (0.5/0.25)^2
    assert (r.q_minus, r.q_plus, r.statistic) == pytest.approx((q_minus, q_plus, 4.0))
    # mixture null with K - 1 = 2: 1/2 P(chi2_1 > 4) + 1/4 P(chi2_2 > 4)
    assert r.p_value == pytest.approx(0.5 * stats.chi2.sf(4, 1) + 0.25 * stats.chi2.sf(4, 2))


def test_same_signs_and_too_few():
    r = gail_simon([0.2, 0.3, 0.1], [0.1, 0.1, 0.1])
    assert r.statistic == 0 and r.p_value == pytest.approx(1 - 0.25)
    assert np.isnan(gail_simon([0.2, np.nan], [0.1, 0.1]).p_value)
