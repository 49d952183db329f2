"""Newton and chord steps for the per-stratum models, one grouped query per step.

Each query returns ``X'WX`` (Newton steps) or only ``X'W(z)`` (chord steps) per stratum for the
propensity and the outcome model at once; the first step from zero needs no query of its own
(:func:`_first_sums`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..estimate import glm
from .expressions import _expit
from .grouped import _dot, _grouped, _sym
from .sql import Frag, fmt, raw


@dataclass
class Fitted:
    beta_ps: np.ndarray
    beta_om: np.ndarray
    ok_ps: np.ndarray
    ok_om: np.ndarray
    sep_ps: np.ndarray
    sep_om: np.ndarray


def _model_aggs(tag: str, S: Frag, r: Frag, Z: list, eta: Frag, *, hessian: bool = True):
    P = len(Z)
    iu = np.triu_indices(P)
    out = [(f"{tag}h{i}", fmt("SUM({} * {} * {})", S, Z[a], Z[b])) for i, (a, b) in enumerate(zip(*iu))
           ] if hessian else []
    out += [(f"{tag}g{j}", fmt("SUM({} * {})", r, Z[j])) for j in range(P)]
    out.append((f"{tag}eta", fmt("MAX(CASE WHEN w > 0 THEN ABS({}) ELSE 0.0 END)", eta)))
    return out


def _first_sums(m: pd.DataFrame, p: int, kept, c, sd):
    """``sum w Z Z'``, ``sum w a Z`` and ``sum w y Z`` per stratum from the moments scan, for
    ``Z = (1, z, a)`` with ``z = (u - c) / sd`` the standardised design columns (``u = x - shift``,
    ``c = mean - shift``): what the first Newton step from zero needs, so it costs no scan."""
    k = len(m)
    q = len(kept)
    P = q + 2
    N, Sa, Sy, Sya = (m[c_].to_numpy(float) for c_ in ("sw", "swa", "swy", "swya"))
    iu = np.triu_indices(p)
    sxx = _sym(m[[f"c{i}" for i in range(len(iu[0]))]].to_numpy(), p)[:, kept][:, :, kept] if p else np.zeros((k, 0, 0))
    sx = m[[f"d{j}" for j in range(p)]].to_numpy()[:, kept] if p else np.zeros((k, 0))
    sax = m[[f"da{j}" for j in range(p)]].to_numpy()[:, kept] if p else np.zeros((k, 0))
    syx = m[[f"dy{j}" for j in range(p)]].to_numpy()[:, kept] if p else np.zeros((k, 0))
    sz = (sx - N[:, None] * c) / sd  # sum w z
    szz = (sxx - sx[:, :, None] * c[None, None, :] - c[None, :, None] * sx[:, None, :]
           + N[:, None, None] * np.outer(c, c)[None]) / np.outer(sd, sd)[None]
    ZZ = np.zeros((k, P, P))
    ZZ[:, 0, 0] = N
    ZZ[:, 0, 1:q + 1] = ZZ[:, 1:q + 1, 0] = sz
    ZZ[:, 1:q + 1, 1:q + 1] = szz
    ZZ[:, 0, -1] = ZZ[:, -1, 0] = Sa
    za = (sax - Sa[:, None] * c) / sd
    ZZ[:, 1:q + 1, -1] = ZZ[:, -1, 1:q + 1] = za
    ZZ[:, -1, -1] = Sa  # the exposure is 0 or 1
    aZ = np.column_stack([Sa, za, Sa])
    yZ = np.column_stack([Sy, (syx - Sy[:, None] * c) / sd, Sya])
    one_Z = ZZ[:, 0, :]
    return {"ZZ": ZZ, "aZ": aZ, "yZ": yZ, "Z": one_Z}


#: once a Newton step is this small (relative to 1 + max|beta|), later scans reuse its Hessian and
#: compute only the gradient (the chord method): near the solution this converges about as fast as
#: Newton while each scan sums P values per stratum and model instead of P (P + 3) / 2
CHORD_FROM = 1e-2


def _irls(src, base, ins, Z, masks, okmask, *, binary, need_om, tol, max_iter, start=None) -> Fitted:
    """Newton/IRLS for the propensity and outcome models of every stratum; one scan per iteration.

    The first step (from zero) comes from the moments scan (``start``, see :func:`_first_sums`): at
    zero the logistic weights are all 1/4 and the residuals ``t - 1/2``. Once a model's Newton step is
    small (:data:`CHORD_FROM`), later scans compute only its gradient and reuse the last Hessian (the
    chord, or simplified Newton, method: Ortega & Rheinboldt 1970, *Iterative Solution of Nonlinear
    Equations in Several Variables*, sec. 7.1, from memory); it returns to full Newton steps if a
    chord step fails to shrink by half.
    """
    k, P = masks.shape
    ps_mask = masks.copy()
    ps_mask[:, -1] = False
    beta = {"ps": np.zeros((k, P)), "om": np.zeros((k, P))}
    active = {"ps": okmask.copy(), "om": okmask.copy() if need_om else np.zeros(k, dtype=bool)}
    conv = {"ps": np.zeros(k, dtype=bool), "om": np.zeros(k, dtype=bool)}
    far = {"ps": np.zeros(k), "om": np.zeros(k)}
    chord = {"ps": False, "om": False}
    last_H = {"ps": None, "om": None}
    last_rel = {"ps": np.full(k, np.inf), "om": np.full(k, np.inf)}
    fam_om = "binomial" if binary else "gaussian"
    nq = P * (P + 1) // 2
    for it in range(max_iter):
        todo = [t for t in ("ps", "om") if active[t].any()]
        if not todo:
            break
        if it == 0 and start is not None:  # beta = 0: the sums follow from the moments
            got = {}
            for t in todo:
                gaussian = t == "om" and fam_om == "gaussian"
                scale = 1.0 if gaussian else 0.25
                got[t] = (scale * start["ZZ"],
                          (start["aZ"] if t == "ps" else start["yZ"]) - (0.0 if gaussian else 0.5) * start["Z"],
                          np.zeros(k))
        else:
            S = base[2]()
            outer, etas, links, weights = [], [], [], []
            for t in todo:
                etas.append((f"eta_{t}", _dot(beta[t], Z, S)))
                eta = raw(f"eta_{t}")
                target = raw("a") if t == "ps" else raw("y")
                if t == "om" and fam_om == "gaussian":
                    weights += [(f"S_{t}", raw("w")), (f"r_{t}", fmt("w * (y - {})", eta))]
                else:
                    mu, rest = _expit(eta)
                    links += [(f"mu_{t}", mu), (f"rest_{t}", rest)]
                    weights += [(f"S_{t}", raw(f"w * mu_{t} * rest_{t}")),
                                (f"r_{t}", fmt("w * ({} - mu_" + t + ")", target))]
                outer += _model_aggs(t, raw(f"S_{t}"), raw(f"r_{t}"), Z, eta, hessian=not chord[t])
            res = _grouped(src, base[0], outer, ins.where, k, layers=[base[1], etas, links, weights], st=S)
            got = {}
            for t in todo:
                H = None if chord[t] else _sym(res[[f"{t}h{i}" for i in range(nq)]].to_numpy(), P)
                got[t] = (H, res[[f"{t}g{j}" for j in range(P)]].to_numpy(), res[f"{t}eta"].to_numpy())
        for t in todo:
            H, g, far[t] = got[t]
            was_chord = chord[t]
            if H is None:
                H = last_H[t]
            else:
                last_H[t] = H
            idx = np.flatnonzero(active[t])
            mask = (ps_mask if t == "ps" else masks)[idx]
            step = glm._solve(H[idx], g[idx], mask)
            new = beta[t][idx] + step
            beta[t][idx] = np.where(np.isfinite(new), new, beta[t][idx])
            rel = np.abs(step).max(axis=1) / (1.0 + np.abs(new).max(axis=1))
            done = rel <= tol
            if t == "om" and fam_om == "gaussian":
                done[:] = True  # one weighted least-squares solve is the fit
            bad = ~np.isfinite(new).all(axis=1)
            conv[t][idx[done]] = True
            active[t][idx[done | bad]] = False
            live = ~(done | bad)
            if was_chord and np.any(rel[live] > 0.5 * last_rel[t][idx][live]):
                chord[t] = False  # a chord step that did not halve: back to Newton
            elif not was_chord and live.any() and np.all(rel[live] <= CHORD_FROM):
                chord[t] = True
            last_rel[t][idx] = rel
    sep = {t: (~conv[t]) & (far[t] > glm.SEPARATION_ETA) for t in ("ps", "om")}
    return Fitted(beta["ps"], beta["om"], conv["ps"], conv["om"], sep["ps"], sep["om"])
