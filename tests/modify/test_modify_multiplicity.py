"""Adjusted p-values equal statsmodels; simultaneous intervals by hand."""

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from stratagem.modify.multiplicity import adjusted_p, bonferroni_intervals, maxt_intervals


def test_adjusted_p_equal_statsmodels_and_skip_nan():
    p = np.array([0.01, np.nan, 0.04, 0.03, 0.2])
    for method in ("holm", "fdr_bh"):
        got = adjusted_p(p, method)
        # reference library: statsmodels multipletests
        ref = multipletests(p[[0, 2, 3, 4]], method=method)[1]
        assert np.isnan(got[1])
        assert got[[0, 2, 3, 4]] == pytest.approx(ref)
    # Holm by hand: sorted 0.01, 0.03, 0.04, 0.2 times 4, 3, 2, 1 with running max
    assert adjusted_p(p, "holm")[[0, 3, 2, 4]] == pytest.approx([0.04, 0.09, 0.09, 0.2])


def test_bonferroni_by_hand_and_ratio_scale():
    theta = np.array([0.1, 0.3, np.nan])
    se = np.array([0.05, 0.1, 0.1])
    lo, hi, m = bonferroni_intervals(theta, se, 0.95, ratio=False)
    z = stats.norm.ppf(1 - 0.05 / 4)
    assert m == 2
    assert lo[:2] == pytest.approx(theta[:2] - z * se[:2]) and hi[:2] == pytest.approx(theta[:2] + z * se[:2])
    assert np.isnan(lo[2])
    rlo, rhi, _ = bonferroni_intervals(theta, se, 0.95, ratio=True)
    assert rlo[:2] == pytest.approx(np.exp(lo[:2]))


def test_maxt_covers_all_strata_jointly_at_level():
    rng = np.random.default_rng(0)
    theta = np.array([0.0, 1.0, 2.0])
    se = np.array([1.0, 2.0, 0.5])
    boot = theta + rng.standard_normal((20000, 3)) * se
    lo, hi, c = maxt_intervals(theta, se, boot, 0.95, ratio=False)
    inside = np.all((boot >= lo) & (boot <= hi), axis=1).mean()
    assert inside == pytest.approx(0.95, abs=0.005)
    # independent normals: c solves (2 Phi(c) - 1)^3 = 0.95
    exact = stats.norm.ppf((1 + 0.95 ** (1 / 3)) / 2)
    assert c == pytest.approx(exact, abs=0.05)
    # wider than pointwise, narrower than or close to Bonferroni
    assert stats.norm.ppf(0.975) < c <= stats.norm.ppf(1 - 0.05 / 6) + 0.02


def test_fast_paths_equal_statsmodels_on_random_inputs():
    rng = np.random.default_rng(4)
    for m in (1, 2, 3, 7, 30):
        for _ in range(6):
            p = rng.random(m) ** 3
            if m > 2:
                p[1] = p[0]  # ties
            for method in ("holm", "fdr_bh"):
                # reference library: statsmodels multipletests
                assert adjusted_p(p, method) == pytest.approx(multipletests(p, method=method)[1])
    assert adjusted_p([0.01, 0.02], "bonferroni") == pytest.approx([0.02, 0.04])
