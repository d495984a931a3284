"""Fitting the maps of :mod:`onnxcal.maps` as ``fit_scaling`` methods.

``fit_map`` calls the map's own solver on the rows (and bootstrap count
weights) it is given and wraps its :class:`~onnxcal.maps.MapFit` into the
:class:`FitResult` every method returns: the notes become warnings, a
solver that ran out of passes says so. ``--l2`` is the penalty weight of
the maps that have one (matrix and Dirichlet: the ODIR weight lambda = mu,
where 0 means the default 100; beta and one-vs-rest Platt: a pull toward
the identity); the other maps have no penalty and ignore it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import maps
from ..scaling import Scaling

# The maps whose solver takes a previous fit as its starting point (bootstrap replicates).
_WARM = ("matrix", "dirichlet", "beta", "ovr-platt")
# The maps with a penalty; their default weight when --l2 is 0.
_PENALISED = {"matrix": maps.matrix.DEFAULT_L2, "dirichlet": maps.dirichlet.DEFAULT_L2, "beta": 0.0, "ovr-platt": 0.0}


def map_keywords(method: str, l2: float, start: Scaling | None) -> dict[str, Any]:
    """The keywords of the map's ``fit`` for ``--l2`` and a warm start."""
    kw: dict[str, Any] = {}
    if method in _PENALISED:
        kw["l2"] = l2 if l2 > 0 else _PENALISED[method]
    if method in _WARM and start is not None and start.method == method:
        kw["start"] = dict(start.parameters)
    return kw


def slow_fit_warning(method: str, n_rows: int, num_classes: int) -> str | None:
    """The warning to print before a matrix or Dirichlet fit expected to take minutes, else None."""
    if method not in ("matrix", "dirichlet"):
        return None
    text: str | None = maps.module(method).slow_fit_warning(n_rows, num_classes)
    return text


def fit_map(
    logits: np.ndarray,
    labels: np.ndarray,
    method: str,
    kind: str,
    l2: float,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    start: Scaling | None = None,
    temperature: float | None = None,
) -> tuple[Scaling, float, bool, tuple[str, ...], bool]:
    """Fit ``method`` to the logits: (scaling, passes, converged, warnings, a parameter on its bound).

    ``temperature``: ensemble temperature scaling's T, fitted by the caller
    (onnxcal.fit's temperature solver), which fixes it for the weights.
    """
    kw = map_keywords(method, l2, start)
    if temperature is not None:
        kw["temperature"] = temperature
    res = maps.module(method).fit(logits, labels, rows=rows, weights=weights, **kw)
    notes = list(res.notes)
    if not res.converged and not notes:
        notes.append(f"the {method} solver stopped at its budget of passes before converging")
    return (Scaling(method, dict(res.parameters), kind), float(res.passes), bool(res.converged), tuple(notes),
            bool(res.on_bound))
