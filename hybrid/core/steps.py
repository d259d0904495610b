"""The trainer's pieces: the rating data, the fitted blocks, the objective and its three exact
half-steps (users, items, map), each a minimisation over one block with the others fixed.

The alternating loop that uses them is :mod:`hybrid.core.train`; the learned prior
(:mod:`hybrid.core.prior`) uses them too, which is why they live apart from the loop.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import scipy.sparse as sp

from hybrid.core.blocks import design, leverage_rows, rater_sums, solve_rows, sse_rows
from hybrid.core.mapsolve import column_parts, map_solver


@dataclass
class RatingData:
    """Ratings as two CSR copies (by user, by item) of ``r - mu``.

    The trainer touches the ratings only through the methods below, each a
    pure block function of :mod:`hybrid.core.blocks` applied to a copy; another
    engine (:mod:`hybrid.engines.cluster`) offers the same methods over partitions.
    """

    by_user: sp.csr_matrix
    by_item: sp.csr_matrix
    mu: float

    @classmethod
    def from_codes(cls, users, items, ratings, n_users, n_items, mu=None):
        """Build both copies from integer codes; ``mu`` defaults to the mean rating."""
        mu = float(np.mean(ratings)) if mu is None else float(mu)
        by_user = sp.csr_matrix((np.asarray(ratings, float) - mu, (users, items)),
                                shape=(n_users, n_items))
        by_user.sort_indices()
        by_item = by_user.T.tocsr()
        by_item.sort_indices()
        return cls(by_user, by_item, mu)

    @property
    def nnz(self) -> int:
        return self.by_user.nnz

    @property
    def shape(self) -> tuple:
        """(n_users, n_items)."""
        return self.by_user.shape

    def item_counts(self) -> np.ndarray:
        return np.diff(self.by_item.indptr)

    def item_rows(self, rows) -> sp.csr_matrix:
        """The ratings of items ``rows`` (a small CSR, kept locally)."""
        return self.by_item[rows]

    def solve(self, side, F_ext, y_offset, P, prior_mean=None, weight=None, n_jobs=1, with_edf=False,
              rows=None):
        """One half-step: :func:`hybrid.core.blocks.solve_rows` over every ``side`` row (or ``rows``)."""
        R = self.by_user if side == "user" else self.by_item
        R = R if rows is None else R[rows]
        return solve_rows(R.indptr, R.indices, R.data, F_ext, y_offset, P, prior_mean, weight, n_jobs,
                          with_edf)

    def sse(self, F: "Factors") -> float:
        """Sum of squared residuals of every rating."""
        R = self.by_user
        return sse_rows(R.indptr, R.indices, R.data, F.user, F.item, F.biases)

    def leverage(self, F_ext, y_offset, lam_user, members, users=None):
        """Leverage terms of the user fits (:func:`hybrid.core.blocks.leverage_rows`), of
        every user or of the ``users`` given."""
        R = self.by_user if users is None else self.by_user[users]
        return leverage_rows(R.indptr, R.indices, R.data, F_ext, y_offset, lam_user, members)

    def rater_sums(self, user_blocks):
        """Per item, the sum of its raters' ``user_blocks`` rows and of its ratings (``r - mu``)
        (:func:`hybrid.core.blocks.rater_sums`)."""
        R = self.by_item
        return rater_sums(R.indptr, R.indices, R.data, user_blocks)

    def without(self, held) -> "RatingData":
        """The same data less the ratings of items ``held`` (same shapes)."""
        dropped = np.zeros(self.shape[1], bool)
        dropped[held] = True
        # both copies by selecting entries (no transpose, no sort: the order is kept), and
        # entries rather than rows scaled by zero: a rating equal to the mean is a stored zero
        # and must stay
        return RatingData(_keep_entries(self.by_user, ~dropped[self.by_user.indices]),
                          _keep_entries(self.by_item, np.repeat(~dropped, np.diff(self.by_item.indptr))), self.mu)


def _keep_entries(R: sp.csr_matrix, keep) -> sp.csr_matrix:
    """``R`` with only the stored entries where ``keep`` is true."""
    rows = np.repeat(np.arange(R.shape[0]), np.diff(R.indptr))
    indptr = np.concatenate([[0], np.cumsum(np.bincount(rows[keep], minlength=R.shape[0]))])
    return sp.csr_matrix((R.data[keep], R.indices[keep], indptr), shape=R.shape)


@dataclass
class Factors:
    """The fitted blocks; ``user``/``item`` rows are ``[bias, vector]`` with biases."""

    user: np.ndarray
    item: np.ndarray
    W: np.ndarray
    P: np.ndarray
    biases: bool = True
    history: list = field(default_factory=list)
    lam_map: float | None = None
    scales: tuple = (1.0, 1.0)
    loop_scales: tuple = ()   # (ratings, scale) pairs of hybrid.core.loop_scales.loop_scales
    sse: float | None = None
    spread: np.ndarray | None = None   # the learned prior covariance (None: sigma^2 P^-1)
    timings: dict = field(default_factory=dict)   # seconds of the finishing stages

    def split(self, z):
        """(bias, vectors) of a block; bias is ``None`` without biases."""
        return (z[:, 0], z[:, 1:]) if self.biases else (None, z)


def start_factors(n_users, n_items, n_features, d, rng, biases=True, P=None) -> Factors:
    """The trainer's starting point: small random item blocks (zero biases), zero users and
    map, prior precision ``P`` (the identity if not given)."""
    item = rng.normal(0.0, 0.1, (n_items, d))
    if biases:
        item[:, 0] = 0.0
    return Factors(np.zeros((n_users, d)), item, np.zeros((n_features, d)), np.eye(d) if P is None else P, biases)


@dataclass(frozen=True)
class Problem:
    """What the alternating solver minimises: the ratings, the items' attribute rows ``A``,
    each item's prior weight and the two penalties outside ``Factors.P``.  ``rated`` (items
    with ratings) and ``solver`` (the map's factorised solve) follow from them; build with
    :meth:`of`."""

    data: Any
    A: Any
    weight: np.ndarray
    lam_user: float
    lam_map: float
    rated: np.ndarray
    solver: Any

    @classmethod
    def of(cls, data, A, *, lam_user, lam_map, weight=None) -> "Problem":
        weight = np.ones(data.shape[1]) if weight is None else np.asarray(weight, float)
        rated = data.item_counts() > 0
        return cls(data, A, weight, lam_user, lam_map, rated, map_solver(A[rated], weight[rated], lam_map))

    def with_penalties(self, lam_user, lam_map) -> "Problem":
        """The same problem under other penalties (the map's factorisation reused)."""
        return replace(self, lam_user=lam_user, lam_map=lam_map, solver=self.solver.with_penalty(lam_map))

    def epoch(self, F: Factors, n_jobs=1):
        """One alternating epoch: users, items, then the map; returns (objective, sse)."""
        user_step(self.data, F, self.lam_user, n_jobs)
        item_step(self.data, F, self.A, self.weight, n_jobs)
        map_step(F, self.A, self.rated, self.solver, self.data)
        return objective(self.data, F, self.A, self.lam_user, self.lam_map, self.weight, sse=F.sse)


def _offsets(F: Factors, z):
    bias, _ = F.split(z)
    return np.zeros(len(z)) if bias is None else bias


def prior_term(D, P, weight):
    """``sum_i (s_i * D_i)^T P (s_i * D_i)``, ``s_i = sqrt(weight_i)`` (a number or one per coordinate)."""
    weight = np.asarray(weight, float)
    if weight.ndim == 1:
        return float(np.sum((D @ P) * D, axis=1) @ weight)
    Ds = D * np.sqrt(weight)
    return float(np.sum((Ds @ P) * Ds))


def objective(data, F, A, lam_user, lam_map, weight, sse=None):
    """The trainer's objective and the data term (sum of squared errors).

    ``sse`` may be passed when known (the item step computes it for free).
    """
    if sse is None:
        sse = data.sse(F)
    prior = prior_term(F.item - A @ F.W, F.P, weight)
    total = sse + lam_user * float(np.sum(F.user ** 2)) + prior + lam_map * float(np.sum(F.W ** 2))
    return total, sse


_SINGLE_FROM = 2_000_000  # ratings from which the other side's rows are gathered in single precision


def _design(factors, bias, nnz):
    F = design(factors, bias)
    # large problems: the gather of the other side's rows is random access into a table
    # that no longer fits in cache, and float32 halves that traffic; small ones (and the
    # exactness tests) stay in double precision throughout
    return F.astype(np.float32) if nnz >= _SINGLE_FROM else F


def user_step(data, F: Factors, lam_user, n_jobs=1, with_edf=False, rows=None):
    """Exact minimisation over every user's block (or ``rows`` only), items fixed."""
    ib, ix = F.split(F.item)
    d = F.user.shape[1]
    z, edf, _ = data.solve("user", _design(ix, ib, data.nnz), _offsets(F, F.item), lam_user * np.eye(d),
                           None, None, n_jobs, with_edf, rows)
    F.user[slice(None) if rows is None else rows] = z
    return edf


def item_step(data, F: Factors, A, weight, n_jobs=1, with_edf=False, rows=None, shift=None):
    """Exact minimisation over every item's block (or ``rows`` only), users and map fixed.

    ``shift`` (one per selected item) is added to the bias of the prior mean
    ``W^T a_i`` (the launch offset of items that were new at the fit).
    """
    ub, ut = F.split(F.user)
    sel = slice(None) if rows is None else rows
    prior_mean = np.asarray(A[sel] @ F.W)
    if shift is not None:
        prior_mean[:, 0] += shift
    z, edf, sse = data.solve("item", _design(ut, ub, data.nnz), _offsets(F, F.user), F.P, prior_mean,
                             weight[sel], n_jobs, with_edf, rows)
    F.item[sel] = z
    F.sse = sse  # the data term after this step (a map step leaves it unchanged)
    return edf


def map_step(F: Factors, A, rated, solver, data=None):
    """Exact minimisation over ``W`` jointly with the unrated items' blocks.

    For any ``W`` the best block of an unrated item is its prior mean, at
    zero cost, so ``W`` is fitted to the rated items alone and the unrated
    ones then follow ``W^T a_i``.  Data that can reduce the normal equations
    where the items live (``data.map_rhs``, the cluster engine) does so.
    """
    W = np.zeros_like(F.W)
    for cols, part in column_parts(solver, F.W.shape[1]):
        P = F.P[np.ix_(cols, cols)]
        if part.primal and hasattr(data, "map_rhs"):
            weight = np.zeros(len(rated))
            weight[rated] = part.sw[:, 0] ** 2
            W[:, cols] = part.solve_rhs(data.map_rhs(F.item[:, cols], weight), P)
        else:
            W[:, cols] = part.solve(F.item[rated][:, cols], P)
    F.W = W
    unrated = ~rated
    if unrated.any():
        F.item[unrated] = A[unrated] @ F.W


def precision_floor(P, floor):
    """``P`` with every eigenvalue below ``floor``'s smallest raised to it (symmetric ``P``).

    >>> precision_floor(np.diag([9.0, 0.25]), 2.0 * np.eye(2))
    array([[9., 0.],
           [0., 2.]])
    """
    low = np.linalg.eigvalsh(floor).min()
    s, V = np.linalg.eigh(0.5 * (P + P.T))
    return (V * np.maximum(s, low)) @ V.T
