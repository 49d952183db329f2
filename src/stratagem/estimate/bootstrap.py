"""Nonparametric bootstrap of any estimator: resample individuals, re-estimate, take percentiles.

Individuals are resampled with replacement (Efron & Tibshirani 1993, *An Introduction to the
Bootstrap*, ch. 6 and 13 for percentile intervals). With a ``counts`` column each row stands for that
many individuals, so a replicate's row frequencies are drawn from a multinomial over individuals;
without one each row is one individual. Randomness comes only from ``numpy.random.default_rng(seed)``
(PCG64), so the same seed gives the same replicates on any machine.

An estimator may provide a vectorised ``boot(prep, spec, W) -> (m1, m0)`` taking a (B, n) matrix of
row frequencies; otherwise each replicate re-runs the estimator with the replicate's frequencies.
An estimator that estimates the measure directly (``GroupMeans.theta``, e.g. Mantel-Haenszel) may
return ``(m1, m0, theta)`` from ``boot``; :func:`bootstrap_replicates` then also returns the
replicates of ``theta`` (analysis scale), and the slow path collects ``gm.theta`` likewise.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..frame import Prepared
from ..spec import Spec

__all__ = ["replicate_weights", "bootstrap_means", "bootstrap_replicates"]

CHUNK_CELLS = 20_000_000  # largest (B x n) block of weights held at once (160 MB of float64)


DRAW_CELLS = 2_000_000  # row draws made at once when every row is one individual (16 MB of int64)


def _resample_rows(rng: np.random.Generator, b: int, n: int) -> np.ndarray:
    """Row frequencies of ``b`` replicates that each draw ``n`` of ``n`` rows with replacement, (b, n).

    The same distribution as ``rng.multinomial(n, [1/n] * n, size=b)`` (counting uniform draws is the
    definition of the multinomial), drawn as uniform integers and counted: several times faster than
    numpy's multinomial sampler, which walks the categories one binomial draw at a time.
    """
    out = np.empty((b, n))
    step = max(1, DRAW_CELLS // max(n, 1))
    for lo in range(0, b, step):
        hi = min(b, lo + step)
        idx = rng.integers(0, n, size=(hi - lo, n))
        idx += (np.arange(hi - lo) * n)[:, None]
        out[lo:hi] = np.bincount(idx.ravel(), minlength=(hi - lo) * n).reshape(hi - lo, n)
    return out


def replicate_weights(prep: Prepared, spec: Spec):
    """Yield blocks of replicate row frequencies, shape (b, n), B rows in all, in a fixed order.

    Rows of frequency 1 (no ``counts``): uniform draws of rows, counted; a table of counts: one
    multinomial draw over its rows per replicate, with probabilities proportional to the counts.
    """
    rng = np.random.default_rng(spec.seed)
    total = int(round(prep.w.sum()))
    p = prep.w / prep.w.sum()
    n = len(p)
    unit = bool(np.all(prep.w == 1.0))
    block = max(1, min(spec.n_boot, CHUNK_CELLS // max(n, 1)))
    done = 0
    while done < spec.n_boot:
        b = min(block, spec.n_boot - done)
        yield _resample_rows(rng, b, n) if unit else rng.multinomial(total, p, size=b).astype(float)
        done += b


def bootstrap_means(estimator, prep: Prepared, spec: Spec, progress=None):
    """Replicates of (m1, m0) per group, each of shape (B, G).

    ``progress``, if given, is called with the fraction done after every block (for progress bars).
    """
    m1, m0, _ = bootstrap_replicates(estimator, prep, spec, progress=progress)
    return m1, m0


def bootstrap_replicates(estimator, prep: Prepared, spec: Spec, progress=None):
    """Replicates ``(m1, m0, theta)`` per group, each (B, G); ``theta`` is None unless the estimator
    estimates the measure directly (its ``boot`` returns three arrays, or it sets ``gm.theta``).
    """
    fast = getattr(estimator, "boot", None)
    m1s, m0s, thetas = [], [], []
    done = 0
    for W in replicate_weights(prep, spec):
        theta = None
        if fast is not None:
            got = fast(prep, spec, W)
            m1, m0 = got[0], got[1]
            theta = got[2] if len(got) > 2 else None
        else:
            m1 = np.empty((W.shape[0], prep.n_strata + 1))
            m0 = np.empty_like(m1)
            for i, w in enumerate(W):
                gm = estimator(replace(prep, w=w), spec)
                m1[i], m0[i] = gm.m1, gm.m0
                if gm.theta is not None:
                    if theta is None:
                        theta = np.full_like(m1, np.nan)
                    theta[i] = gm.theta
        m1s.append(m1)
        m0s.append(m0)
        thetas.append(theta)
        done += W.shape[0]
        if progress is not None:
            progress(done / spec.n_boot)
    theta_all = None if any(t is None for t in thetas) else np.vstack(thetas)
    return np.vstack(m1s), np.vstack(m0s), theta_all
