"""The joint alternating solver.

Minimises, with ``z_i = [b_i, x_i]`` and ``w_u = [b_u, theta_u]``::

    sum_(i,u) (r_iu - mu - b_u - b_i - theta_u . x_i)^2
      + lam_user * sum_u |w_u|^2
      + sum_i c_i (z_i - W^T a_i)^T P (z_i - W^T a_i)
      + lam_map * |W|^2

with ``P = lam_item * I`` and ``c_i = 1`` unless the map is weighted.  Each
half-step (users, items, map) is an exact minimisation over its block, so the
objective never increases.  The penalties are the ones chosen for prediction
(:mod:`hybrid.core.penalties`).  With the learned prior, the spread of items around
their projection, which the planner's uncertainty reads, is estimated after
the epochs (cross-fitted EM, :mod:`hybrid.core.prior`) and kept beside ``P``
(``Factors.spread``) rather than fed back into the fit.
"""
from __future__ import annotations

import time

import numpy as np

from hybrid.core.accelerate import fixed_point
from hybrid.core.blocks import blas_threads
from hybrid.core.loop_scales import loop_scales
from hybrid.core.mapsolve import block_diagonal
from hybrid.core.prior import learn_prior, predictive_sigma2, well_rated
from hybrid.core.steps import (
    Factors,
    Problem,
    item_step,
    map_step,
    objective,
    precision_floor,
    start_factors,
    user_step,
)


def fit_factors(problem: Problem, *, rank, lam_item, epochs, tol, seed, biases=True, prior="fixed", n_jobs=1,
                validate=None, on_epoch=None):
    """Run the alternating solver on ``problem`` from a seeded start.

    Returns the fitted :class:`Factors`, the residual variance of the fit
    (degrees-of-freedom corrected; the noise of the ratings the model was
    fitted to) and the variance of a new rating (see
    :func:`hybrid.core.prior.predictive_sigma2`, recalibrated with the learned prior).

    Parameters
    ----------
    problem : Problem
        The ratings, attributes, prior weights and penalties (:class:`hybrid.core.steps.Problem`).
    rank, lam_item, biases
        The blocks' size, their starting prior precision ``lam_item * I``, and whether they
        carry a bias.
    validate : callable, optional
        ``validate(F) -> rmse`` called after each epoch.
    on_epoch : callable, optional
        ``on_epoch(record)`` with the epoch's figures, for progress display.
    """
    n_users, n_items = problem.data.shape
    d = rank + 1 if biases else rank
    F = start_factors(n_users, n_items, problem.A.shape[1], d, np.random.default_rng(seed), biases,
                      lam_item * np.eye(d))
    # with our own threads, BLAS runs on one: its idle threads would spin against ours
    with blas_threads(1 if n_jobs > 1 else None):
        run_epochs(problem, F, epochs, tol, n_jobs, validate, on_epoch)
    return _finish(problem, F, prior, seed, n_jobs)


def run_epochs(problem: Problem, F: Factors, epochs, tol, n_jobs=1, validate=None, on_epoch=None):
    """Alternating epochs on ``F`` (in place) until ``epochs`` or a relative change below ``tol``."""
    previous = np.inf
    for epoch in range(1, epochs + 1):
        t0 = time.perf_counter()
        total, sse = problem.epoch(F, n_jobs)
        record = {"epoch": epoch, "objective": total, "train_rmse": float(np.sqrt(sse / problem.data.nnz)),
                  "valid_rmse": float(validate(F)) if validate else float("nan"),
                  "seconds": time.perf_counter() - t0}
        F.history.append(record)
        if on_epoch:
            on_epoch(record)
        if abs(previous - total) <= tol * abs(total):
            break
        previous = total


def _finish(problem: Problem, F: Factors, prior, seed, n_jobs, settle=30):
    """Degrees of freedom, the noise variances and, with the learned prior, the prior."""
    data, A, weight, lam_user, lam_map = problem.data, problem.A, problem.weight, problem.lam_user, problem.lam_map
    edf_u = user_step(data, F, lam_user, n_jobs, with_edf=True)
    edf_i = item_step(data, F, A, weight, n_jobs, with_edf=True)
    sse = objective(data, F, A, lam_user, lam_map, weight)[1]
    fit_sigma2 = sse / max(data.nnz - edf_u.sum() - edf_i.sum(), 1.0)
    counts = data.item_counts()
    sigma2_new = predictive_sigma2(data, F, lam_user, fit_sigma2, well_rated(counts), seed=seed)
    if prior == "learned":
        t0 = time.perf_counter()
        Psi, sigma2_new, F.scales, folds = learn_prior(problem, F, sigma2_new, seed, n_jobs)
        F.spread = Psi    # what the planner's uncertainty reads
        # The fit's penalty is the learned precision with no direction weaker than the
        # penalty chosen on held-out ratings: the learned prior knows that biases vary
        # less than tastes (on the club its bias precision is 9x the vectors'), the chosen
        # penalty that a point estimate at a generous rank needs more shrinkage than the
        # Bayes spread gives (fitted under the learned prior alone, rank 64 on MovieLens
        # scored 0.870 where its chosen penalty scores 0.846).
        F.P = block_diagonal(precision_floor(fit_sigma2 * np.linalg.inv(Psi), F.P), weight)

        def settle_round(W):   # the items under map W, then the map under those items
            F.W = W
            item_step(data, F, A, weight, n_jobs)
            map_step(F, A, problem.rated, problem.solver, data)
            return F.W

        # the map and items settle under it (users fixed: a slow linear iteration, mixed)
        F.W = fixed_point(settle_round, F.W, tol=1e-4, most=settle)[0]
        item_step(data, F, A, weight, n_jobs)
        if all(len(f.pool) > 40 for f in folds):   # as the two scales: enough held-out items to judge by
            # how far the trainer's estimates move when ratings are folded in (the third scale)
            F.loop_scales = loop_scales(folds, Psi, fit_sigma2, sigma2_new, F.P, seed=seed)
        F.timings["learned prior"] = time.perf_counter() - t0
    # the last item step leaves every rated item's vector at its exact posterior mean under
    # the final users, map and penalty: the planner samples around these very vectors
    F.lam_map = lam_map
    return F, float(fit_sigma2), float(sigma2_new)
