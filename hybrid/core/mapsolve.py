"""Solves for the attribute map ``W``: each is a weighted ridge regression of the item blocks
on their attributes, under the item prior precision ``P``.

The map step of :mod:`hybrid.core.train`, the learned prior's held-out refits
(:mod:`hybrid.core.prior`) and the launch offset's left-out projections
(:mod:`hybrid.core.launch`) all use these.
"""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp


def column_groups(weight):
    """Columns of the item block sharing one prior weight per item, for an ``(n, d)``
    weight: ``[(columns, weights)]``; the prior precision must not couple groups."""
    weight = np.asarray(weight, float)
    groups = {}
    for j in range(weight.shape[1]):
        key = weight[:, j].tobytes()
        groups.setdefault(key, []).append(j)
    return [(np.array(cols), weight[:, cols[0]]) for cols in groups.values()]


def block_diagonal(M, weight):
    """``M`` with the entries coupling different column groups set to zero."""
    if np.ndim(weight) == 1:
        return M
    out = np.zeros_like(M)
    for cols, _ in column_groups(weight):
        out[np.ix_(cols, cols)] = M[np.ix_(cols, cols)]
    return out


class MapSolver:
    """Exact weighted ridge solves for the map ``W`` under any prior precision.

    The Gram matrix of the rated items' attributes is decomposed once per
    fit; each map step is then a few dense products.  With ``P = Q D Q^T``
    the problem separates along the columns of ``W Q``, column ``j`` being a
    ridge regression with penalty ``lam_map / D_j``.
    """

    def __init__(self, A_rated, weight, lam_map):
        self.lam_map = lam_map
        self.sw = np.sqrt(weight)[:, None]
        At = sp.csr_matrix(A_rated).multiply(self.sw).tocsr()
        self.primal = At.shape[1] <= At.shape[0]
        K = (At.T @ At) if self.primal else (At @ At.T)
        self.s, self.V = np.linalg.eigh(K.toarray() if sp.issparse(K) else K)
        self.s = np.maximum(self.s, 0.0)
        self.At = At

    def with_penalty(self, lam_map) -> "MapSolver":
        """The same decomposition with another penalty (no new factorisation)."""
        other = object.__new__(MapSolver)
        other.__dict__.update(self.__dict__)
        other.lam_map = lam_map
        return other

    def solve(self, Z_rated, P):
        if self.primal:
            return self.solve_rhs(np.asarray(self.At.T @ (self.sw * Z_rated)), P)
        D, Q = np.linalg.eigh(P)
        c = self.lam_map / np.maximum(D, 1e-12)
        core = self.V.T @ ((self.sw * Z_rated) @ Q)
        Wq = self.At.T @ (self.V @ (core / (self.s[:, None] + c[None, :])))
        return np.asarray(Wq) @ Q.T

    def solve_rhs(self, H, P):
        """The map from the normal equations' right-hand side ``H = A^T diag(c) Z``
        over the rated items (primal form: the Gram decomposition is ``p x p``)."""
        D, Q = np.linalg.eigh(P)
        c = self.lam_map / np.maximum(D, 1e-12)
        core = self.V.T @ (H @ Q)
        return (self.V @ (core / (self.s[:, None] + c[None, :]))) @ Q.T

    def leverages(self, rows, P):
        """Each rated item's leverage on its own projection, per eigen-direction of ``P``.

        ``rows`` index the rated items as passed to the constructor; the result
        (len(rows), d) lets a residual be turned into its leave-one-out value.
        """
        D, _ = np.linalg.eigh(P)
        c = self.lam_map / np.maximum(D, 1e-12)
        rows = np.asarray(rows)
        out = np.empty((len(rows), len(D)))
        step = max(1, (1 << 22) // max(self.V.shape[0], 1))   # bounded: a few million floats per block
        for s in range(0, len(rows), step):
            block = rows[s:s + step]
            if self.primal:
                out[s:s + step] = (np.asarray(self.At[block] @ self.V) ** 2) @ (1.0 / (self.s[:, None] + c[None, :]))
            else:
                out[s:s + step] = (self.V[block] ** 2) @ (self.s[:, None] / (self.s[:, None] + c[None, :]))
        return out


class GroupedMapSolver:
    """Map solves with one prior weight per item and column group (``column_groups``):
    with a prior precision that does not couple the groups, each group's columns
    of ``W`` are a weighted ridge regression of their own."""

    def __init__(self, A_rated, weight, lam_map):
        self.groups = [(cols, MapSolver(A_rated, w, lam_map)) for cols, w in column_groups(weight)]
        self.primal = all(s.primal for _, s in self.groups)

    def with_penalty(self, lam_map) -> "GroupedMapSolver":
        other = object.__new__(GroupedMapSolver)
        other.groups = [(cols, s.with_penalty(lam_map)) for cols, s in self.groups]
        other.primal = self.primal
        return other

    def solve(self, Z_rated, P):
        W = np.zeros((self.groups[0][1].At.shape[1], Z_rated.shape[1]))
        for cols, s in self.groups:
            W[:, cols] = s.solve(Z_rated[:, cols], P[np.ix_(cols, cols)])
        return W


def map_solver(A_rated, weight, lam_map):
    """A :class:`MapSolver` for one weight per item, else a :class:`GroupedMapSolver`."""
    weight = np.asarray(weight, float)
    return MapSolver(A_rated, weight, lam_map) if weight.ndim == 1 else GroupedMapSolver(A_rated, weight, lam_map)


def column_parts(solver, d):
    """``[(columns, MapSolver)]``: the solves that make up ``solver`` over a block of ``d`` columns."""
    return solver.groups if isinstance(solver, GroupedMapSolver) else [(np.arange(d), solver)]
