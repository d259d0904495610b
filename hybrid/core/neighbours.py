"""Nearest rows by the distance between vectors, exact, in blocks.

Squared Euclidean distances come from ``|x|^2 + |y|^2 - 2 x.y`` one block of
queries at a time, so memory is bounded by ``chunk x candidates``; the
distances reported for the chosen neighbours are then recomputed directly
from the differences, which the expanded form loses to cancellation.
"""
from __future__ import annotations

import numpy as np

from hybrid.common.errors import InputError

METRICS = ("euclidean", "cosine")
_BUDGET = 1 << 23  # entries of one query x candidate block


def _unit(X):
    norm = np.linalg.norm(X, axis=1, keepdims=True)
    return X / np.where(norm > 0, norm, 1.0)


def nearest(Q: np.ndarray, C: np.ndarray, k: int, metric: str = "euclidean",
            exclude: np.ndarray | None = None):
    """Indices and distances of the ``k`` nearest rows of ``C`` to each row of ``Q``.

    Parameters
    ----------
    Q, C : ndarray (m, r), (n, r)
    k : int
        At most ``n`` (fewer candidates give fewer columns).
    metric : {'euclidean', 'cosine'}
        Cosine distance is ``1 - cos``.
    exclude : ndarray (m,), optional
        For each query, a candidate index to leave out (itself), or -1.

    Returns
    -------
    idx : ndarray (m, k) of int
    dist : ndarray (m, k), ascending along each row

    Examples
    --------
    >>> idx, dist = nearest(np.array([[0.0, 0.0]]), np.array([[3.0, 4.0], [1.0, 0.0]]), 2)
    >>> idx.tolist(), dist.tolist()
    ([[1, 0]], [[1.0, 5.0]])
    """
    if metric not in METRICS:
        raise InputError(f"metric must be one of {', '.join(METRICS)}, found {metric!r}")
    if metric == "cosine":
        Q, C = _unit(Q), _unit(C)
    k = min(k, len(C) - (0 if exclude is None else 1))
    m = len(Q)
    idx = np.zeros((m, max(k, 0)), dtype=np.int64)
    dist = np.zeros((m, max(k, 0)))
    if k <= 0:
        return idx, dist
    c2 = np.einsum("ij,ij->i", C, C)
    step = max(1, _BUDGET // max(len(C), 1))
    for s in range(0, m, step):
        q = Q[s:s + step]
        d2 = np.einsum("ij,ij->i", q, q)[:, None] + c2[None, :] - 2.0 * (q @ C.T)
        if exclude is not None:
            ex = exclude[s:s + step]
            rows = np.flatnonzero(ex >= 0)
            d2[rows, ex[rows]] = np.inf
        part = np.argpartition(d2, k - 1, axis=1)[:, :k] if k < len(C) else np.tile(np.arange(len(C)), (len(q), 1))
        exact = np.sqrt(np.sum((q[:, None, :] - C[part]) ** 2, axis=2))
        if exclude is not None:
            exact[part == ex[:, None]] = np.inf
        order = np.lexsort((part, exact), axis=1)[:, :k]
        idx[s:s + step] = np.take_along_axis(part, order, 1)
        dist[s:s + step] = np.take_along_axis(exact, order, 1)
    if metric == "cosine":
        dist = dist ** 2 / 2.0  # |u - v|^2 = 2 - 2 cos for unit vectors
    return idx, dist
