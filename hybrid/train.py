"""The joint alternating solver.

Minimises, with ``z_i = [b_i, x_i]`` and ``w_u = [b_u, theta_u]``::

    sum_(i,u) (r_iu - mu - b_u - b_i - theta_u . x_i)^2
      + lam_user * sum_u |w_u|^2
      + sum_i c_i (z_i - W^T a_i)^T P (z_i - W^T a_i)
      + lam_map * |W|^2

with ``P = lam_item * I`` and ``c_i = 1`` unless the map is weighted.  Each
half-step (users, items, map) is an exact minimisation over its block, so the
objective never increases.  The penalties are the ones chosen for prediction
(:mod:`hybrid.penalties`).  With the learned prior, the spread of items around
their projection, which the planner's uncertainty reads, is estimated after
the epochs (cross-fitted EM, :mod:`hybrid.prior`) and kept beside ``P``
(``Factors.spread``) rather than fed back into the fit.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from .blocks import blas_threads, design, leverage_rows, solve_rows, sse_rows
from .mapsolve import block_diagonal, column_parts, map_solver
from .prior import learn_prior, predictive_sigma2, well_rated


@dataclass
class RatingData:
    """Ratings as two CSR copies (by user, by item) of ``r - mu``.

    The trainer touches the ratings only through the methods below, each a
    pure block function of :mod:`hybrid.blocks` applied to a copy; another
    engine (:mod:`hybrid.cluster`) offers the same methods over partitions.
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
        """One half-step: :func:`hybrid.blocks.solve_rows` over every ``side`` row (or ``rows``)."""
        R = self.by_user if side == "user" else self.by_item
        R = R if rows is None else R[rows]
        return solve_rows(R.indptr, R.indices, R.data, F_ext, y_offset, P, prior_mean, weight, n_jobs,
                          with_edf)

    def sse(self, F: "Factors") -> float:
        """Sum of squared residuals of every rating."""
        R = self.by_user
        return sse_rows(R.indptr, R.indices, R.data, F.user, F.item, F.biases)

    def leverage(self, F_ext, y_offset, lam_user, members, users=None):
        """Leverage terms of the user fits (:func:`hybrid.blocks.leverage_rows`), of
        every user or of the ``users`` given."""
        R = self.by_user if users is None else self.by_user[users]
        return leverage_rows(R.indptr, R.indices, R.data, F_ext, y_offset, lam_user, members)

    def without(self, held) -> "RatingData":
        """The same data less the ratings of items ``held`` (same shapes)."""
        R = self.by_item
        dropped = np.zeros(R.shape[0], bool)
        dropped[held] = True
        # select entries rather than scale rows by zero: a rating equal to the mean is a
        # stored zero and must stay
        keep = np.repeat(~dropped, np.diff(R.indptr))
        indptr = np.concatenate([[0], np.cumsum(np.where(dropped, 0, np.diff(R.indptr)))])
        by_item = sp.csr_matrix((R.data[keep], R.indices[keep], indptr), shape=R.shape)
        by_user = by_item.T.tocsr()
        by_user.sort_indices()
        return RatingData(by_user, by_item, self.mu)


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
    sse: float | None = None
    spread: np.ndarray | None = None   # the learned prior covariance (None: sigma^2 P^-1)
    timings: dict = field(default_factory=dict)   # seconds of the finishing stages

    def split(self, z):
        """(bias, vectors) of a block; bias is ``None`` without biases."""
        return (z[:, 0], z[:, 1:]) if self.biases else (None, z)


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


def fit_factors(data: RatingData, A, *, rank, lam_user, lam_item, lam_map, epochs, tol,
                seed, prior="fixed", weight=None, biases=True, n_jobs=1, validate=None,
                on_epoch=None, P0=None):
    """Run the alternating solver.

    Returns the fitted :class:`Factors`, the residual variance of the fit
    (degrees-of-freedom corrected; the noise of the ratings the model was
    fitted to) and the variance of a new rating (see
    :func:`hybrid.prior.predictive_sigma2`, recalibrated with the learned prior).

    Parameters
    ----------
    data : RatingData
    A : sparse (n_items, p)
        Attribute design matrix.
    validate : callable, optional
        ``validate(F) -> rmse`` called after each epoch.
    on_epoch : callable, optional
        ``on_epoch(record)`` with the epoch's figures, for progress display.
    P0 : ndarray, optional
        Starting prior precision (default ``lam_item * I``).
    """
    n_users, n_items = data.shape
    d = rank + 1 if biases else rank
    rng = np.random.default_rng(seed)
    weight = np.ones(n_items) if weight is None else np.asarray(weight, float)
    if P0 is not None:
        P0 = block_diagonal(np.array(P0, float), weight)
    item = rng.normal(0.0, 0.1, (n_items, d))
    if biases:
        item[:, 0] = 0.0
    F = Factors(user=np.zeros((n_users, d)), item=item, W=np.zeros((A.shape[1], d)),
                P=lam_item * np.eye(d) if P0 is None else np.array(P0, float), biases=biases)
    rated = data.item_counts() > 0
    solver = map_solver(A[rated], weight[rated], lam_map)
    # with our own threads, BLAS runs on one: its idle threads would spin against ours
    with blas_threads(1 if n_jobs > 1 else None):
        _epochs(data, F, A, lam_user, lam_map, weight, rated, solver, epochs, tol, n_jobs, validate, on_epoch)
    return _finish(data, F, A, lam_user, lam_map, weight, rated, solver, prior, seed, n_jobs)


def _epochs(data, F, A, lam_user, lam_map, weight, rated, solver, epochs, tol, n_jobs, validate, on_epoch):
    previous = np.inf
    for epoch in range(1, epochs + 1):
        t0 = time.perf_counter()
        user_step(data, F, lam_user, n_jobs)
        item_step(data, F, A, weight, n_jobs)
        map_step(F, A, rated, solver, data)
        total, sse = objective(data, F, A, lam_user, lam_map, weight, sse=F.sse)
        record = {"epoch": epoch, "objective": total, "train_rmse": float(np.sqrt(sse / data.nnz)),
                  "valid_rmse": float(validate(F)) if validate else float("nan"),
                  "seconds": time.perf_counter() - t0}
        F.history.append(record)
        if on_epoch:
            on_epoch(record)
        if abs(previous - total) <= tol * abs(total):
            break
        previous = total


def precision_floor(P, floor):
    """``P`` with every eigenvalue below ``floor``'s smallest raised to it (symmetric ``P``).

    >>> precision_floor(np.diag([9.0, 0.25]), 2.0 * np.eye(2))
    array([[9., 0.],
           [0., 2.]])
    """
    low = np.linalg.eigvalsh(floor).min()
    s, V = np.linalg.eigh(0.5 * (P + P.T))
    return (V * np.maximum(s, low)) @ V.T


def _finish(data, F, A, lam_user, lam_map, weight, rated, solver, prior, seed, n_jobs, settle=30):
    """Degrees of freedom, the noise variances and, with the learned prior, the prior."""
    edf_u = user_step(data, F, lam_user, n_jobs, with_edf=True)
    edf_i = item_step(data, F, A, weight, n_jobs, with_edf=True)
    sse = objective(data, F, A, lam_user, lam_map, weight)[1]
    fit_sigma2 = sse / max(data.nnz - edf_u.sum() - edf_i.sum(), 1.0)
    counts = data.item_counts()
    sigma2_new = predictive_sigma2(data, F, lam_user, fit_sigma2, well_rated(counts), seed=seed)
    if prior == "learned":
        t0 = time.perf_counter()
        Psi, sigma2_new, F.scales = learn_prior(data, F, A, weight, sigma2_new, lam_user, lam_map, seed,
                                                n_jobs)
        F.spread = Psi    # what the planner's uncertainty reads
        # The fit's penalty is the learned precision with no direction weaker than the
        # penalty chosen on held-out ratings: the learned prior knows that biases vary
        # less than tastes (on the club its bias precision is 9x the vectors'), the chosen
        # penalty that a point estimate at a generous rank needs more shrinkage than the
        # Bayes spread gives (fitted under the learned prior alone, rank 64 on MovieLens
        # scored 0.870 where its chosen penalty scores 0.846).
        F.P = block_diagonal(precision_floor(fit_sigma2 * np.linalg.inv(Psi), F.P), weight)
        for _ in range(settle):  # the map and items settle under it
            W_old = F.W
            item_step(data, F, A, weight, n_jobs)
            map_step(F, A, rated, solver, data)
            if np.abs(F.W - W_old).max() <= 1e-4 * max(np.abs(W_old).max(), 1.0):
                break
        item_step(data, F, A, weight, n_jobs)
        F.timings["learned prior"] = time.perf_counter() - t0
    # the last item step leaves every rated item's vector at its exact posterior mean under
    # the final users, map and penalty: the planner samples around these very vectors
    F.lam_map = lam_map
    return F, float(fit_sigma2), float(sigma2_new)
