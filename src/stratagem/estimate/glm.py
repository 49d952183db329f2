"""Batched logistic and linear regression by Newton's method (IRLS), with frequency weights.

One call fits one model or many at once: the design ``X`` (n, p) is shared and the frequency weights
are a vector (n,) or a matrix (B, n), one row per model (e.g. bootstrap replicates, where a row holds
how often each individual was drawn). All B fits run together as a few large matrix products per
Newton step, which is what makes a vectorised bootstrap fast; this is written by hand because
statsmodels fits one model per call.

For the logistic model (canonical logit link) a Newton step is the IRLS step (McCullagh & Nelder,
*Generalized Linear Models*, 2nd ed., 1989, sec. 2.5): with ``mu = expit(X b)``, the information
``H = X' diag(w mu (1 - mu)) X`` and score ``g = X' w (y - mu)``, ``b <- b + H^{-1} g``. The linear
model (Gaussian, identity link) is one weighted least-squares solve. Both equal
``statsmodels.api.GLM(y, X, family=Binomial() / Gaussian(), freq_weights=w)`` (tested to 1e-6).

How the arithmetic is laid out (for speed; the results are the same root of the score equations):
a single model's Newton step is one pass over ``X`` in blocks of rows that stay in cache, and near
the solution the information of the last Newton step is reused while only the score is recomputed
(the chord method; Kelley, *Iterative Methods for Linear and Nonlinear Equations*, 1995, sec. 5.4).
Many models (bootstrap replicates) are held rows by models, with the products of column pairs
computed once; when they all start from one point (replicates started from the full-sample fit)
their first step is a chord step with one information matrix shared by all (:func:`_chord_start`),
which costs a score instead of an information per model, and the Newton steps that follow (the
convergence test is always on a Newton step) need one step fewer. Every matrix product is cut into pieces small enough that OpenBLAS runs each on one
thread, summed in a fixed order (:func:`dot_rows`, :func:`dot_cols`): results are bit-identical
whatever the number of BLAS threads, and small products do not pay for waking BLAS threads.

Logistic fits are damped Newton iterations (step-halving; McCullagh & Nelder 1989, sec. 2.5;
Marschner, "glm2: Fitting generalized linear models with convergence problems", R Journal 3(2),
2011, from memory): a step that does not decrease the weighted negative log-likelihood of its model
is halved, up to ``MAX_HALVINGS`` times. With frequency weights of a million on a few rows, plain
Newton steps overshoot until the coefficients run off to infinity; the halved steps converge. Most
steps are proved to decrease the likelihood by a cheap bound (:func:`_certain_descent`), so the
likelihood (a logarithm per row) is only computed for steps that could overshoot, and on data where
every full step decreases it the iterates are exactly the undamped ones.

Per-model column masks fix chosen coefficients at zero (e.g. a column that is constant in one
stratum, or the exposure column when the same design serves a propensity model). A column with no
weight at all in one replicate is masked for that replicate automatically.

Failures are reported, never hidden: ``converged`` is False when the relative change of the
coefficients has not fallen below ``tol`` after ``max_iter`` steps, and ``separated`` marks
non-converged logistic fits whose linear predictor has run off (|eta| > 15 on a row with weight),
the signature of complete or quasi-complete separation (Albert & Anderson, *Biometrika* 71, 1984),
where the maximum-likelihood estimate does not exist.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import xlogy

__all__ = [
    "GLMFit", "fit", "linear_predictor", "expit_inplace", "information", "projection", "logistic",
    "weighted_gram",
    "dot_rows", "dot_cols",
]

FAMILIES = ("binomial", "gaussian")
PAIR_BYTES = 256 * 2**20  # largest (n x p(p+1)/2) table of column products kept for batched fits
SEPARATION_ETA = 15.0
CHUNK_ROWS = 8192  # rows per block of a single fit's Newton step (a block of X stays in cache)
EXP_LIMIT = 700.0  # exp(700) is finite; logistic(-700) ~ 1e-304, below any meaningful risk
# Matrix products are cut into pieces small enough that OpenBLAS runs each on one thread (it threads
# a gemm only above m*n*k = 4 * 65536 and a gemv above m*n = 4 * 2304), and the pieces are summed in
# a fixed order: results do not depend on the number of BLAS threads, and small products do not pay
# for waking threads (very slow on a busy machine).
GEMM_SERIAL = 200_000
GEMV_SERIAL = 8_000
BLOCKS_AT_ONCE = 32  # pieces multiplied per numpy call in dot_cols (bounds its temporary)
REP_BLOCK = 64  # most replicate models updated together in a batched fit
CHORD_SWITCH = 1e-3  # relative step size below which Newton's information is kept (chord steps)
MAX_HALVINGS = 30  # step-halvings tried before a logistic fit gives up (as glm2's inner loop)
DESCENT_SLACK = 1e-8  # relative rise of the negative log-likelihood taken as rounding, not a rise
CERTAIN_BELOW = 0.9  # a step whose descent bound is below this (1 in exact arithmetic) is not checked


def _block_rows(k: int, c: int) -> int:
    limit = GEMV_SERIAL if c == 1 else GEMM_SERIAL
    return max(1, limit // max(k * c, 1))


def dot_rows(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """``A @ B`` for A (n, k) and B (k, c) or (k,), in row blocks: shape (n, c) or (n,).

    Each block is one small (single-threaded) BLAS call, so the result does not depend on the
    number of BLAS threads. ``A`` should be C-contiguous (its row blocks are then views).
    """
    n, k = A.shape
    vec = B.ndim == 1
    c = 1 if vec else B.shape[1]
    rows = _block_rows(k, c)
    out = np.empty((n,) if vec else (n, c))
    nb = n // rows
    m = nb * rows
    if nb:
        shape = (nb, rows) if vec else (nb, rows, c)
        np.matmul(A[:m].reshape(nb, rows, k), B, out=out[:m].reshape(shape))
    if m < n:
        out[m:] = A[m:] @ B
    return out


def dot_cols(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """``A.T @ B`` for A (n, k) and B (n, c) or (n,): shape (k, c) or (k,).

    The sum over rows is taken over blocks of rows, each one small (single-threaded) BLAS call,
    added in a fixed order: the result does not depend on the number of BLAS threads.
    """
    n, k = A.shape
    vec = B.ndim == 1
    c = 1 if vec else B.shape[1]
    rows = _block_rows(k, c)
    out = np.zeros((k,) if vec else (k, c))
    nb = n // rows
    step = rows * BLOCKS_AT_ONCE
    for lo in range(0, nb * rows, step):
        hi = min(nb * rows, lo + step)
        nb_here = (hi - lo) // rows
        Ab = A[lo:hi].reshape(nb_here, rows, k).transpose(0, 2, 1)
        part = np.matmul(Ab, B[lo:hi].reshape(nb_here, rows, c)).sum(axis=0)
        out += part[:, 0] if vec else part
    m = nb * rows
    if m < n:
        out += A[m:].T @ B[m:]
    return out


def logistic(eta: np.ndarray, out_rest: bool = False):
    """``expit(eta)`` (and ``1 - expit(eta)``, computed without cancellation, if ``out_rest``).

    Written with numpy's vectorised ``exp`` because ``scipy.special.expit`` is several times slower
    on large arrays; ``1 / (1 + exp(-eta))`` is scipy's own formula. ``eta`` is clipped at
    ``-EXP_LIMIT`` so ``exp`` cannot overflow.
    """
    t = np.maximum(eta, -EXP_LIMIT)
    np.negative(t, out=t)
    np.exp(t, out=t)  # t = exp(-eta)
    mu = t + 1.0
    np.reciprocal(mu, out=mu)
    if not out_rest:
        return mu
    t *= mu  # exp(-eta) / (1 + exp(-eta)) = 1 - mu, accurate when mu is near 1
    return mu, t


def weighted_gram(X: np.ndarray, s: np.ndarray, extra: np.ndarray | None = None) -> np.ndarray:
    """``X' diag(s) X`` (p, p), or ``X' [diag(s) X, extra]`` (p, p + 1) when ``extra`` (n,) is given.

    Computed over blocks of ``CHUNK_ROWS`` rows summed in a fixed order (see :func:`dot_cols`), so
    no (n, p) temporary is made and the result does not depend on the number of BLAS threads.
    """
    n, p = X.shape
    q = p + (extra is not None)
    out = np.zeros((p, q))
    buf = np.empty((min(CHUNK_ROWS, n), q))
    for lo in range(0, n, CHUNK_ROWS):
        hi = min(n, lo + CHUNK_ROWS)
        Xc, M = X[lo:hi], buf[: hi - lo]
        np.multiply(Xc, s[lo:hi, None], out=M[:, :p])
        if extra is not None:
            M[:, p] = extra[lo:hi]
        out += dot_cols(Xc, M)
    return out


def _row_nll(mu, rest, y_sel, y, y_binary):
    """Negative log-likelihood of each row of a logistic model (before weighting).

    ``mu`` and ``rest = 1 - mu`` come from :func:`logistic`; ``y_sel`` is ``y == 1`` (binary
    outcomes). A row whose fitted probability of its own outcome has underflowed to 0 gives ``inf``.
    """
    with np.errstate(divide="ignore"):
        if y_binary:
            out = np.where(y_sel, mu, rest)
            np.log(out, out=out)
            np.negative(out, out=out)
            return out
        return -(xlogy(y, mu) + xlogy(1.0 - y, rest))


def _weighted_nll(w: np.ndarray, nll: np.ndarray):
    """``sum(w * nll)`` over rows (axis 0), numpy's fixed-order sum; rows with weight 0 add 0 even
    where their ``nll`` is infinite."""
    with np.errstate(invalid="ignore"):
        prod = w * nll
    total = prod.sum(axis=0)
    if np.isnan(total).any():
        total = np.where(w > 0, prod, 0.0).sum(axis=0)
    return total


def _nll_at(X, y, y_one, y_binary, W, bT):
    """Negative log-likelihood of logistic models with coefficients ``bT`` (p, B) and weights ``W``
    (n, B) (or (p,) and (n,) for one model), in blocks of rows; an extra pass used only when a step
    needs checking from a point whose likelihood was not computed yet."""
    vec = bT.ndim == 1
    if not np.any(bT):  # at 0 every fitted probability is 1/2: the likelihood is sum(w) log 2
        return W.sum(axis=0) * np.log(2.0)
    n = X.shape[0]
    rows = CHUNK_ROWS if vec else max(256, BATCH_CELLS // bT.shape[1])
    total = 0.0 if vec else np.zeros(bT.shape[1])
    for lo in range(0, n, rows):
        hi = min(n, lo + rows)
        mu, rest = logistic(dot_rows(X[lo:hi], bT), out_rest=True)
        yc = y[lo:hi] if vec else y[lo:hi, None]
        total = total + _weighted_nll(W[lo:hi], _row_nll(mu, rest, y_one[lo:hi], yc, y_binary))
    return total


def _worse(nll_new, nll_old):
    """Whether a candidate's negative log-likelihood is not a decrease (elementwise): not finite,
    or above the accepted one by more than rounding (``DESCENT_SLACK`` relative, as glm2 does)."""
    nll_new = np.asarray(nll_new, dtype=float)
    with np.errstate(invalid="ignore"):
        return ~np.isfinite(nll_new) | (nll_new - nll_old > DESCENT_SLACK * (0.1 + np.abs(nll_new)))


def _col_absmax(X: np.ndarray) -> np.ndarray:
    """``max_i |X_ij|`` per column (p,), in blocks of rows. (numpy reduces a tall, narrow array
    along its rows slowly; viewing ``k`` rows as one wide row first is several times faster.)"""
    n, p = X.shape
    out = np.zeros(p)
    k = max(1, -(-128 // max(p, 1)))
    for lo in range(0, n, CHUNK_ROWS):
        Xc = np.abs(X[lo : lo + CHUNK_ROWS])
        m = (len(Xc) // k) * k
        if m:
            np.maximum(out, Xc[:m].reshape(-1, k * p).max(axis=0).reshape(k, p).max(axis=0), out=out)
        if m < len(Xc):
            np.maximum(out, Xc[m:].max(axis=0), out=out)
    return out


def _certain_descent(step, shift, colmax):
    """Whether a step is sure to decrease the logistic negative log-likelihood, without evaluating
    it (elementwise over models: ``step``, ``shift`` (B, p) or (p,)).

    Along a step ``d`` the likelihood ``phi(t)`` of logistic regression satisfies
    ``|phi'''| <= R phi''`` with ``R = max_i |x_i' d|`` (since ``|l'''| <= l''`` for the logistic
    loss; Bach, "Self-concordant analysis for logistic regression", Electron. J. Statist. 4, 2010,
    from memory), so ``phi(1) - phi(0) <= phi'(0) + phi''(0) (e^R - 1 - R) / R^2``. For a step
    ``d = H^{-1} g`` with the information ``H`` taken at a point ``shift`` away from the current one,
    ``-phi'(0) = g'd = d'Hd`` and ``phi''(0) <= e^{R_H} d'Hd`` (same argument,
    ``R_H = max_i |x_i' shift|``): the step decreases the likelihood when
    ``e^{R_H} (e^R - 1 - R) / R^2 < 1``. ``R`` is bounded by ``sum_j |d_j| max_i |x_ij|``; a margin
    (``CERTAIN_BELOW``) keeps rounding out.
    """
    R = np.abs(step) @ colmax
    RH = np.abs(shift) @ colmax
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        ratio = np.where(R > 1e-4, (np.expm1(R) - R) / (R * R), 0.5 + R / 6.0)
        bound = np.exp(RH) * ratio
    return bound < CERTAIN_BELOW


def _newton_single(X, y, w, mask, beta, tol, max_iter, y_binary):
    """Logistic Newton steps for one model, each step one pass over ``X`` in cache-sized blocks:
    per block the linear predictor, ``w mu (1 - mu)`` and ``w (y - mu)``, then ``X' [S X, r]``.

    Once the steps are small (below ``CHORD_SWITCH``), the information of the last Newton step is
    kept and only the score is recomputed (the chord method: each step then costs a third as much,
    and as the information changes little near the solution the error still shrinks by orders of
    magnitude per step); a step that does not halve the previous one brings back full Newton steps.
    The solution is the same root of the score equations.

    Step-halving (a damped Newton method; McCullagh & Nelder 1989; Marschner, "glm2: Fitting
    generalized linear models with convergence problems", R Journal 3(2), 2011, from memory): a step
    not sure to decrease the negative log-likelihood (:func:`_certain_descent`) is checked, the
    likelihood at the new point computed in the same pass; when it is not a decrease
    (:func:`_worse`), the point is rejected and the step halved, up to ``MAX_HALVINGS`` times (then
    the fit stops, not converged, at the last accepted point). Steps that do decrease it are taken
    as they are, so where every full step decreases the likelihood nothing changes.
    """
    n, p = X.shape
    y_one = y == 1
    converged = False
    n_iter = 0
    M = mask[None, :]
    buf = np.empty((min(CHUNK_ROWS, n), p + 1))
    colmax = np.zeros(p)  # max_i |x_ij|, taken in the first pass while each block is in cache
    H = beta_H = None
    prev = np.inf
    base, nll_base, step, halvings, check = None, np.nan, None, 0, False
    while n_iter < max_iter:
        chord = H is not None and prev <= CHORD_SWITCH
        HG = np.zeros((p, p + 1))
        nll = 0.0
        for lo in range(0, n, CHUNK_ROWS):
            hi = min(n, lo + CHUNK_ROWS)
            Xc, wc, B = X[lo:hi], w[lo:hi], buf[: hi - lo]
            mu, rest = logistic(dot_rows(Xc, beta), out_rest=True)
            if base is None:
                np.maximum(colmax, _col_absmax(Xc), out=colmax)
            if check:
                nll += _weighted_nll(wc, _row_nll(mu, rest, y_one[lo:hi], y[lo:hi], y_binary))
            if y_binary:
                r = np.where(y_one[lo:hi], rest, -mu)
            else:
                yc = y[lo:hi]
                r = yc * rest - (1.0 - yc) * mu
            r *= wc
            if chord:
                HG[:, p] += dot_cols(Xc, r)
                continue
            mu *= rest
            mu *= wc  # w mu (1 - mu)
            np.multiply(Xc, mu[:, None], out=B[:, :p])
            B[:, p] = r
            HG += dot_cols(Xc, B)
        if check and _worse(nll, nll_base):
            if halvings == MAX_HALVINGS:
                beta = base  # no shorter step decreases the likelihood: stop at the best point
                break
            halvings += 1
            step = 0.5 * step
            beta = base + step
            H = None  # the next accepted point starts again with a full Newton step
            continue
        base, nll_base, halvings = beta, (nll if check else np.nan), 0
        n_iter += 1
        if not chord:
            H = HG[None, :, :p].copy()
            beta_H = base
        step = _solve(H, HG[None, :, p], M)[0]
        new = beta + step
        beta = new
        if not np.isfinite(new).all():
            break
        size = np.abs(step).max(initial=0.0) / (1.0 + np.abs(new).max(initial=0.0))
        if size <= tol:
            converged = True
            break
        if chord and size > 0.5 * prev:
            H = None  # the chord steps stall: back to Newton steps
        prev = size
        check = not _certain_descent(step, base - beta_H, colmax)
        if check and np.isnan(nll_base):
            nll_base = _nll_at(X, y, y_one, y_binary, w, base)
    return beta, converged, n_iter


@dataclass
class GLMFit:
    """Result of :func:`fit`.

    Attributes
    ----------
    beta : ndarray, shape (p,) or (B, p)
        Coefficients (masked ones are 0).
    converged, separated : bool or bool ndarray (B,)
    n_iter : int
        Newton steps taken by the slowest model.
    mask : bool ndarray, shape (p,) or (B, p)
        Columns that were estimated.
    """

    beta: np.ndarray
    converged: np.ndarray
    separated: np.ndarray
    n_iter: int
    mask: np.ndarray


def linear_predictor(X: np.ndarray, beta: np.ndarray) -> np.ndarray:
    """``X @ beta`` for one (p,) or many (B, p) coefficient vectors: shape (n,) or (B, n).

    Many vectors: ``beta @ X'`` in pieces of columns, each one small (single-threaded) BLAS call
    writing straight into its columns of the (B, n) result (no rows-by-models array to transpose;
    several times faster than that transpose on a busy machine). Each entry is a sum over the p
    coefficients only, so the pieces do not change it.
    """
    X = np.ascontiguousarray(X)
    if beta.ndim == 1:
        return dot_rows(X, beta)
    n, p = X.shape
    B = beta.shape[0]
    beta = np.ascontiguousarray(beta, dtype=float)
    out = np.empty((B, n))
    rows = _block_rows(B, p)
    nb = n // rows
    m = nb * rows
    if nb:
        pieces = X[:m].reshape(nb, rows, p).transpose(0, 2, 1)  # (nb, p, rows) views
        np.matmul(beta, pieces, out=out[:, :m].reshape(B, nb, rows).transpose(1, 0, 2))
    if m < n:
        out[:, m:] = beta @ X[m:].T
    return out


def expit_inplace(eta: np.ndarray) -> np.ndarray:
    """``expit(eta)`` written over ``eta`` (returned): :func:`logistic` without its temporaries."""
    np.maximum(eta, -EXP_LIMIT, out=eta)
    np.negative(eta, out=eta)
    np.exp(eta, out=eta)
    eta += 1.0
    return np.reciprocal(eta, out=eta)


def _pairs(X: np.ndarray):
    p = X.shape[1]
    iu = np.triu_indices(p)
    return iu, X[:, iu[0]] * X[:, iu[1]]


def _crossprod(X: np.ndarray, St: np.ndarray, pairs) -> np.ndarray:
    """``X' diag(St[:, b]) X`` for every column b of St (n, B): shape (B, p, p)."""
    B = St.shape[1]
    p = X.shape[1]
    if pairs is None:
        out = np.empty((B, p, p))
        for b in range(B):
            out[b] = weighted_gram(X, np.ascontiguousarray(St[:, b]))
        return out
    iu, XX = pairs
    flat = dot_cols(XX, St)  # (q, B): one pass over the column products for all B models
    out = np.empty((B, p, p))
    out[:, iu[0], iu[1]] = flat.T
    out[:, iu[1], iu[0]] = flat.T
    return out


BATCH_CELLS = 32_768  # rows x models handled at once inside a batched Newton step (256 kB each)


def _score_info(X, y, y_one, y_binary, Wa, bT, XX, check=None):
    """Information, ``X' W mu`` and negative log-likelihood of B logistic models on a block of rows
    (rows by models).

    With ``XX`` (the block's column products) returns ``(flat (q, B), xwm (p, B), nll)``; without
    it ``(H (B, p, p), xwm (B, p), nll)``. ``xwm = X' diag(w) mu``: the caller takes the score as
    ``X' w y - X' w mu`` with ``X' w y`` computed once per fit, which spares a pass per row and
    model. ``nll`` holds the negative log-likelihood of the models selected by the boolean ``check``
    (B,) only (None when none is).

    Seven elementwise passes over the block: ``exp(-eta)`` is computed from ``X (-b)`` (a negated
    coefficient matrix, so no negation pass), in place, into buffers reused within the call.
    """
    t = dot_rows(X, -bT)  # -eta (rows, B); exactly the negation of X b
    np.minimum(t, EXP_LIMIT, out=t)
    np.exp(t, out=t)  # exp(-eta)
    mu = t + 1.0
    np.reciprocal(mu, out=mu)  # expit(eta), as logistic()
    t *= mu  # 1 - mu, without cancellation
    nll = None
    if check is not None and check.any():
        yc = y[:, None]
        if check.all():
            nll = _weighted_nll(Wa, _row_nll(mu, t, y_one, yc, y_binary))
        else:
            nll = _weighted_nll(Wa[:, check], _row_nll(mu[:, check], t[:, check], y_one, yc, y_binary))
    np.multiply(mu, Wa, out=mu)  # w mu
    t *= mu  # w mu (1 - mu)
    if XX is None:
        return _crossprod(X, t, None), dot_cols(X, mu).T, nll
    return dot_cols(XX, t), dot_cols(X, mu), nll


CHORD_START_R = 8.0  # largest bound on max_i |x_i' d| of an accepted chord start (see _chord_start)


def _chord_start(X, y, Wt, M, b0, colmax):
    """Starting points for B logistic models that all start from ``b0``: one chord step each.

    At the shared start every model has the same fitted values, so the score of model b is
    ``X' diag(W_b) (y - mu0)``: one matrix product for all models, with no pass over the rows by
    models. The step solves it with one information matrix shared by all the models,
    ``X' diag(mean_b W_b mu0 (1 - mu0)) X`` (for bootstrap replicates started from the full-sample
    fit, this is the full-sample information up to resampling noise): the chord method (Ortega &
    Rheinboldt, *Iterative Solution of Nonlinear Equations in Several Variables*, 1970, from
    memory), whose step here is a Newton step up to the relative difference between the shared and
    each model's own information. Newton steps follow from the points returned, so the fits
    end at the same root of the score equations, to the same tolerance; the chord step only
    replaces the first, most expensive-to-batch Newton step by one that costs a score.

    A model's chord step is kept only when it is finite and moves no linear predictor by more than
    ``CHORD_START_R`` (bounded by ``sum_j |d_j| max_i |x_ij|``); otherwise that model starts at
    ``b0``. Either way the Newton steps that follow (with their step-halving) make the fit; the
    bound only keeps a step taken with an information far from the model's own (a replicate whose
    weight sits on a few rows) from sending it to a poor start.
    Columns without weight in a model are held at their start (as :func:`_solve` does for Newton
    steps).
    """
    n, p = X.shape
    mu0, rest0 = logistic(dot_rows(X, b0), out_rest=True)
    r0 = np.where(y == 1, rest0, -mu0) if np.all((y == 0) | (y == 1)) else y * rest0 - (1.0 - y) * mu0
    wbar = dot_rows(Wt, np.full(Wt.shape[1], 1.0 / Wt.shape[1]))  # mean weight of each row
    A = np.empty((n, 2 * p))
    np.multiply(X, r0[:, None], out=A[:, :p])
    np.multiply(X, X, out=A[:, p:])
    GD = dot_cols(A, Wt)  # (2p, B): scores at b0, and sum_i W_bi x_ij^2 (whether column j has weight)
    Hbar = weighted_gram(X, wbar * (mu0 * rest0))
    B = Wt.shape[1]
    Mb = M & (GD[p:].T > 0.0)
    step = _solve(np.broadcast_to(Hbar, (B, p, p)), GD[:p].T, Mb)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(step).all(axis=1) & (np.abs(step) @ colmax <= CHORD_START_R)
    out = np.broadcast_to(b0, (B, p)).copy()
    out[ok] += step[ok]
    return out


def _newton_batch(X, y, Wt, M, beta, tol, max_iter, family, pairs):
    """Newton steps for B models at once, rows by models: ``Wt`` (n, B) weights, ``beta`` (B, p).

    Returns ``(beta, converged, n_iter)``. Models leave the batch when they converge (or fail).
    (Chord steps all the way, as in :func:`_newton_single`, were tried here and lost: warm-started
    bootstrap fits converge in a few Newton steps, while the chord steps' linear rate needed about
    seven. What pays is one chord step first: when every model starts from the same point (bootstrap
    replicates from the full-sample fit), :func:`_chord_start` moves each model with a step that
    costs one matrix product for them all, and two Newton steps instead of three then reach the
    convergence test; measured on 100,000 rows in 12 strata, a third less time per fit.)

    Step-halving as in :func:`_newton_single`, model by model: each pass evaluates every active
    model at its candidate point, with the negative log-likelihood of the models whose last step was
    not sure to decrease it; a model whose likelihood did not decrease halves its last step instead
    of taking a new one (the others go on with Newton steps in the same pass).
    """
    n, p = X.shape
    B = Wt.shape[1]
    converged = np.zeros(B, dtype=bool)
    if family == "gaussian":
        H = _crossprod(X, Wt, pairs)
        g = dot_cols(X, Wt * y[:, None]).T
        converged[:] = True
        return _solve(H, g, M), converged, 1
    active = np.ones(B, dtype=bool)
    y_binary = bool(np.all((y == 0) | (y == 1)))
    y_one = (y == 1)[:, None]
    steps = np.zeros(B, dtype=np.int64)  # Newton steps taken by each model
    halvings = np.zeros(B, dtype=np.int64)  # halvings of each model's current step
    base = beta.copy()  # last accepted point of each model
    nll_base = np.full(B, np.nan)  # its negative log-likelihood, where computed
    check = np.zeros(B, dtype=bool)  # the candidate point's likelihood is to be checked
    step = np.zeros((B, p))
    colmax = _col_absmax(X)
    if B > 1 and (beta == beta[:1]).all():  # a shared start (bootstrap replicates): one chord step
        beta = _chord_start(X, y, Wt, M, beta[0], colmax)
        base = beta.copy()
    GY = dot_cols(X * y[:, None], Wt)  # (p, B): X' diag(w) y of every model, once per fit
    while True:
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        b = beta[idx]
        bT = np.ascontiguousarray(b.T)
        Wa = Wt if idx.size == B else np.ascontiguousarray(Wt[:, idx])
        chk = check[idx]
        nll = np.zeros(int(chk.sum()))
        gy = GY if idx.size == B else GY[:, idx]
        if pairs is None:
            H, xwm, lc = _score_info(X, y, y_one, y_binary, Wa, bT, None, chk)
            g = gy.T - xwm
            if lc is not None:
                nll += lc
        else:
            H, g = np.empty((idx.size, p, p)), np.zeros((p, idx.size))
            flat = np.zeros((pairs[1].shape[1], idx.size))
            rows = max(256, BATCH_CELLS // idx.size)  # a block of rows by models stays in cache
            for lo in range(0, n, rows):
                hi = min(n, lo + rows)
                f, gc, lc = _score_info(X[lo:hi], y[lo:hi], y_one[lo:hi], y_binary, Wa[lo:hi], bT,
                                        pairs[1][lo:hi], chk)
                flat += f
                g += gc
                if lc is not None:
                    nll += lc
            iu = pairs[0]
            H[:, iu[0], iu[1]] = flat.T
            H[:, iu[1], iu[0]] = flat.T
            g = (gy - g).T
        worse = np.zeros(idx.size, dtype=bool)
        worse[chk] = _worse(nll, nll_base[idx[chk]])
        full = np.full(idx.size, np.nan)
        full[chk] = nll
        if worse.any():
            rej = idx[worse]
            stuck = rej[halvings[rej] >= MAX_HALVINGS]
            beta[stuck] = base[stuck]  # no shorter step decreases the likelihood: stop, not converged
            active[stuck] = False
            go = rej[halvings[rej] < MAX_HALVINGS]
            halvings[go] += 1
            step[go] *= 0.5
            beta[go] = base[go] + step[go]
            keep = ~worse
            idx, H, g, b, full = idx[keep], H[keep], g[keep], b[keep], full[keep]
            if idx.size == 0:
                continue
        base[idx], nll_base[idx], halvings[idx] = b, full, 0
        steps[idx] += 1
        st = _solve(H, g, M[idx])
        new = b + st
        step[idx] = st
        beta[idx] = new
        done = np.abs(st).max(axis=1) <= tol * (1.0 + np.abs(new).max(axis=1))
        bad = ~np.isfinite(new).all(axis=1)
        converged[idx[done]] = True
        active[idx[done | bad | (steps[idx] >= max_iter)]] = False
        go = idx[~(done | bad | (steps[idx] >= max_iter))]
        check[go] = ~_certain_descent(step[go], np.zeros((go.size, p)), colmax)
        need = go[check[go] & np.isnan(nll_base[go])]
        if need.size:  # a step to check from a point whose likelihood is not known yet
            nll_base[need] = _nll_at(X, y, y_one, y_binary, np.ascontiguousarray(Wt[:, need]),
                                     np.ascontiguousarray(base[need].T))
    return beta, converged, int(steps.max(initial=0))


def _solve(H: np.ndarray, g: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Solve H[b] x = g[b] for every b with masked coordinates held at 0."""
    H = H.copy()
    g = g.copy()
    diag = np.einsum("bii->bi", H)
    mask = mask & (diag > 0.0)  # a column with no weight at all (e.g. a level absent in a replicate)
    both = mask[:, :, None] & mask[:, None, :]
    H[~both] = 0.0
    idx = np.arange(H.shape[1])
    H[:, idx, idx] = np.where(mask, np.einsum("bii->bi", H), 1.0)
    g[~mask] = 0.0
    try:
        return np.linalg.solve(H, g[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:  # a singular system in some model: least squares for each
        return np.stack([np.linalg.lstsq(h, v, rcond=None)[0] for h, v in zip(H, g)])


def fit(
    X: np.ndarray,
    y: np.ndarray,
    w: np.ndarray | None = None,
    *,
    family: str = "binomial",
    mask: np.ndarray | None = None,
    beta0: np.ndarray | None = None,
    tol: float = 1e-10,
    max_iter: int = 60,
    pairs=None,
) -> GLMFit:
    """Fit one or many GLMs sharing the design ``X``.

    Parameters
    ----------
    X : ndarray (n, p)
        Design, including an intercept column if one is wanted.
    y : ndarray (n,)
        Outcome: 0/1 for ``"binomial"``, numeric for ``"gaussian"``.
    w : ndarray (n,) or (B, n), optional
        Frequency weights (default all 1); a matrix fits one model per row.
    family : {"binomial", "gaussian"}
        Logistic (logit link) or linear (identity link) regression.
    mask : bool ndarray (p,) or (B, p), optional
        Columns to estimate; the others are fixed at 0.
    beta0 : ndarray (p,) or (B, p), optional
        Starting values (e.g. the full-sample fit, for bootstrap replicates).
    pairs : optional
        ``_pairs(X)`` computed before (the column products used by batched fits), to reuse it.
    tol, max_iter
        Convergence when ``max|step| <= tol * (1 + max|beta|)``; at most ``max_iter`` steps.

    Returns
    -------
    GLMFit
        With 1-D results when ``w`` is 1-D or None, else one row per model.
    """
    if family not in FAMILIES:
        raise ValueError(f"family must be one of {FAMILIES}; got {family!r}")
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    n, p = X.shape
    single = w is None or np.ndim(w) == 1
    W = np.ones((1, n)) if w is None else np.atleast_2d(np.asarray(w, dtype=float))
    B = W.shape[0]
    M = np.ones((B, p), dtype=bool) if mask is None else np.broadcast_to(mask, (B, p)).copy()
    beta = np.zeros((B, p)) if beta0 is None else np.broadcast_to(beta0, (B, p)).astype(float)
    beta = np.where(M, beta, 0.0)
    q = p * (p + 1) // 2
    if pairs is None and B > 1 and n * q * 8 <= PAIR_BYTES:
        pairs = _pairs(np.ascontiguousarray(X))
    converged = np.zeros(B, dtype=bool)
    separated = np.zeros(B, dtype=bool)
    n_iter = 0
    if B == 1 and family == "gaussian":
        HG = weighted_gram(X, W[0], W[0] * y)
        beta = _solve(HG[None, :, :p], HG[None, :, p], M)
        converged[:] = True
        n_iter = 1
    elif B == 1:
        y_binary = bool(np.all((y == 0) | (y == 1)))
        b, conv, n_iter = _newton_single(X, y, W[0], M[0], beta[0].copy(), tol, max_iter, y_binary)
        beta[0] = b
        converged[0] = conv
        if not conv:
            with np.errstate(over="ignore", invalid="ignore"):  # coefficients may have run off to inf
                eta = linear_predictor(X, np.nan_to_num(b))
            separated[0] = bool(((np.abs(eta) > SEPARATION_ETA) & (W[0] > 0)).any()) or not np.isfinite(b).all()
    else:
        X = np.ascontiguousarray(X)
        for lo in range(0, B, REP_BLOCK):  # groups of models, so each product piece stays small
            hi = min(B, lo + REP_BLOCK)
            Wt = np.ascontiguousarray(W[lo:hi].T)
            b, conv, it = _newton_batch(X, y, Wt, M[lo:hi], beta[lo:hi].copy(), tol, max_iter, family, pairs)
            beta[lo:hi] = b
            converged[lo:hi] = conv
            n_iter = max(n_iter, it)
            lost = np.flatnonzero(~conv)
            if lost.size:
                with np.errstate(over="ignore", invalid="ignore"):  # coefficients may have run off
                    eta = dot_rows(X, np.ascontiguousarray(np.nan_to_num(b[lost]).T))  # (n, L)
                far = ((np.abs(eta) > SEPARATION_ETA) & (Wt[:, lost] > 0)).any(axis=0)
                separated[lo + lost] = far | ~np.isfinite(b[lost]).all(axis=1)
    if single:
        return GLMFit(beta[0], converged[0], separated[0], n_iter, M[0])
    return GLMFit(beta, converged, separated, n_iter, M)


def information(X: np.ndarray, w: np.ndarray, v: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Mean information ``sum(w v x x') / sum(w)`` restricted to the masked columns (one model)."""
    return weighted_gram(X, w * v)[np.ix_(mask, mask)] / w.sum()


def projection(
    X: np.ndarray, w: np.ndarray, v: np.ndarray, resid: np.ndarray, mask: np.ndarray, D: np.ndarray
) -> np.ndarray:
    """Per-row term ``D' I^{-1} x_i r_i`` that carries a fitted GLM's uncertainty into a mean.

    For an estimator whose estimating function depends on GLM coefficients ``b``, ``D`` is the mean
    derivative of that function with respect to ``b`` (length p, weighted by ``w``, divided by
    ``sum(w)``), ``I`` the mean information and ``r = y - mu`` the GLM residuals; adding this term to
    the estimator's own influence function gives the stacked estimating-equation (sandwich) variance
    (Stefanski & Boos, *The American Statistician* 56, 2002).
    """
    info = information(X, w, v, mask)
    c = np.zeros(X.shape[1])
    c[mask] = np.linalg.lstsq(info, D[mask], rcond=None)[0]
    return dot_rows(np.ascontiguousarray(X), c) * resid
