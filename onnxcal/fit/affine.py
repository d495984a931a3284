"""Vector scaling and Platt scaling: L-BFGS-B on (w, b) (see :mod:`onnxcal.fit`)."""

from __future__ import annotations

import numpy as np

from ..metrics import iter_chunks, sigmoid
from ..scaling import Scaling
from .options import B_MAX, T_MAX, T_MIN, FitResult, _first, _result
from .temperature import _dot

# --------------------------------------------------------------------------
# Vector and Platt scaling: L-BFGS-B on (w, b)


def _affine_pass(
    logits: np.ndarray, labels: np.ndarray, w: np.ndarray, b: np.ndarray, rows: np.ndarray | None,
    weights: np.ndarray | None, softmax: bool,
) -> tuple[float | np.ndarray, np.ndarray, np.ndarray]:
    """Mean NLL of act(w * z + b) and its gradient in w and b."""
    k = logits.shape[1]
    f: float | np.ndarray = 0.0  # a number, or a 0-d array once a chunk is added
    gw, gb, total = np.zeros(k), np.zeros(k), 0.0
    for z, y, wt in iter_chunks(logits, labels, rows, weights):
        s = z * w + b
        if softmax:
            r = np.arange(len(y))
            smax = s.max(axis=1, keepdims=True)
            s -= smax
            e = np.exp(s)
            tot = e.sum(axis=1)
            f += _dot(np.log(tot) - s[r, y], wt)
            resid = e
            resid /= tot[:, None]
            resid[r, y] -= 1.0  # p - onehot(y)
        else:
            yv = y.reshape(len(y), -1).astype(np.float64)
            f += _dot((np.logaddexp(0.0, s) - yv * s).sum(axis=1), wt)
            resid = sigmoid(s) - yv
        gb += _dot(resid, wt)
        resid *= z
        gw += _dot(resid, wt)
        total += len(y) if wt is None else float(wt.sum())
    return f / total, gw / total, gb / total


def _logit_scale(logits: np.ndarray, rows: np.ndarray | None) -> float:
    """RMS of the logits on up to ~10 000 evenly spaced rows (to precondition w)."""
    idx = np.arange(len(logits)) if rows is None else rows
    sample = np.asarray(logits[idx[:: max(1, len(idx) // 10_000)]], dtype=np.float64)
    return float(np.sqrt(np.mean(sample * sample))) or 1.0


def _fit_affine(
    logits: np.ndarray, labels: np.ndarray, method: str, l2: float, rows: np.ndarray | None,
    weights: np.ndarray | None, start: Scaling | None, kind: str,
) -> FitResult:
    k = logits.shape[1]
    softmax = method == "vector"
    evals = 0
    # Optimise u = c * w with c the logits' RMS, so a unit step in u moves the
    # scaled logits as much as a unit step in b (L-BFGS starts from an identity
    # Hessian; without this it needs many more passes on large logits).
    c = _logit_scale(logits, rows)

    def objective(x: np.ndarray) -> tuple[float, np.ndarray]:
        nonlocal evals
        evals += 1
        w, b = x[:k] / c, x[k:]
        f, gw, gb = _affine_pass(logits, labels, w, b, rows, weights, softmax)
        f += l2 * (np.sum((w - 1.0) ** 2) + np.sum(b * b))
        return float(f), np.concatenate([(gw + 2.0 * l2 * (w - 1.0)) / c, gb + 2.0 * l2 * b])

    if start is None:
        x0 = np.concatenate([np.full(k, c), np.zeros(k)])
    else:
        a = start.arrays()
        x0 = np.concatenate([c * np.broadcast_to(a["w"], (k,)), np.broadcast_to(a["b"], (k,))])
    bounds = [(c / T_MAX, c / T_MIN)] * k + [(-B_MAX, B_MAX)] * k
    import scipy.optimize  # here, not at import: it takes ~0.5 s, and `onnxcal inspect` never fits

    res = scipy.optimize.minimize(
        objective, x0, jac=True, method="L-BFGS-B", bounds=bounds,
        options={"maxiter": 2000, "maxfun": 4000, "ftol": 1e-12, "gtol": 1e-8, "maxcor": 20},
    )
    res.x[:k] /= c
    res.jac[:k] *= c
    w, b = res.x[:k], res.x[k:].copy()
    if softmax:
        # softmax(s + c) = softmax(s): report the biases with mean 0 (the L2
        # optimum has it already, as the NLL is flat along b + c).
        b -= b.mean()
    notes = _affine_bound_notes(w, b, labels, softmax)
    if not notes and _unseparated(logits, labels, rows, weights, softmax) == 0:
        notes.append(
            "the model is right on every sample of this set, so the likelihood keeps rising "
            "as the scales grow and the fit stopped at an arbitrary large scale; use a larger "
            "or harder validation set"
        )
    scaling = Scaling.of_affine(w if softmax else w[0], b if softmax else b[0], method, kind)
    n_rows = len(logits) if rows is None else len(rows)
    # L-BFGS-B stops on a small relative change of f or of the projected
    # gradient; "abnormal" line-search ends at the optimum count as converged
    # when the projected gradient is small.
    bounds = [(1.0 / T_MAX, 1.0 / T_MIN)] * k + [(-B_MAX, B_MAX)] * k
    converged = bool(res.success) or float(np.max(np.abs(_projected(res.jac, res.x, bounds)))) < 1e-6
    return _result(scaling, evals * (1.0 if rows is None else len(rows) / max(n_rows, 1)), converged, notes)


def _unseparated(
    logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None, weights: np.ndarray | None, softmax: bool
) -> int:
    """Rows (entries) whose true score is not strictly on the right side."""
    count = 0
    for z, y, w in iter_chunks(logits, labels, rows, weights):
        if softmax:
            zy = z[np.arange(len(y)), y]
            bad = (z >= zy[:, None]).sum(axis=1) > 1
        else:
            bad = ((2.0 * y.reshape(len(y), -1) - 1.0) * z <= 0).any(axis=1)
        count += int(np.count_nonzero(bad if w is None else bad & (w > 0)))
    return count


def _projected(grad: np.ndarray, x: np.ndarray, bounds: list[tuple[float, float]]) -> np.ndarray:
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    g = np.asarray(grad, dtype=np.float64).copy()
    g[(x <= lo) & (g > 0)] = 0.0
    g[(x >= hi) & (g < 0)] = 0.0
    return g


def _affine_bound_notes(w: np.ndarray, b: np.ndarray, labels: np.ndarray, softmax: bool) -> list[str]:
    notes = []
    high = np.flatnonzero(w >= (1.0 / T_MIN) * (1 - 1e-9))
    low = np.flatnonzero(w <= (1.0 / T_MAX) * (1 + 1e-9))
    edge = np.flatnonzero(np.abs(b) >= B_MAX * (1 - 1e-9))
    which = "classes " if softmax else ""
    if high.size:
        notes.append(
            f"the scale w of {which}{_first(high) if softmax else 'the logit'} lies at its upper bound "
            f"{1 / T_MIN:g}: the model separates them (nearly) perfectly on this set, so the "
            "likelihood keeps rising as the scale grows; use a larger or harder validation set"
        )
    if low.size:
        notes.append(
            f"the scale w of {which}{_first(low) if softmax else 'the logit'} lies at its lower bound "
            f"{1 / T_MAX:g}: the scores carry almost no information about the labels; check "
            "that the labels match the model's classes"
        )
    if edge.size:
        notes.append(
            f"the bias b of {which}{_first(edge) if softmax else 'the logit'} lies at its bound "
            f"±{B_MAX:g}: a class that is absent (or always present) in the labels drives it "
            "there; add samples of every class or use --l2"
        )
    return notes
