"""The learned item prior: how far items fall from their attribute projection.

The planner's posteriors are only as true as this prior.  Its spread must be
the spread of an item the model did not fit: in-sample, the users' vectors
and the map have adapted to each rated item, which pulls it toward its own
projection, so in-sample deviations understate how far a new item falls.
The estimate is therefore cross-fitted: a seeded set of well-rated items is
held out, the users are re-solved without their ratings and the map without
their vectors, the held-out items are solved against those, and an EM
iteration (Dempster, Laird and Rubin, 1977) gives the covariance of their
deviations from the out-of-sample projection, net of their own posterior
spread (the empirical-Bayes estimate of Morris, JASA 1983).
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from sklearn.exceptions import ConvergenceWarning

from hybrid.common.limits import SETTINGS
from hybrid.common.seeds import stream
from hybrid.core.blocks import design, row_grams
from hybrid.core.mapsolve import block_diagonal
from hybrid.core.posterior import gaussian_posterior
from hybrid.core.steps import Factors, Problem, user_step
from hybrid.core.variance_scales import variance_scales


def well_rated(counts, min_ratings=20, least=50):
    """Items whose ratings pin their vectors down: ``min_ratings`` or more, or the
    ``least`` most-rated if too few reach that."""
    counts = np.asarray(counts)
    members = counts >= min_ratings
    if members.sum() < least:
        members = np.zeros(len(counts), bool)
        members[np.argsort(-counts, kind="stable")[:least]] = True
        members &= counts > 0
    return members


def predictive_sigma2(data, F, lam_user, sigma2, members, most=4000, seed=0):
    """Variance of a *new* rating around ``theta_u . x_i`` as the item step sees it.

    The item step treats the users' vectors as known, but each is itself an
    estimate, so a rating the users were not fitted to strays further than
    the noise: by ``sigma^2 c^T (G_u + lam I)^-1 c`` for item row ``c``.  With
    the in-sample leverage ``h`` of each rating, that out-of-sample term is
    ``h / (1 - h)``, so the effective variance is ``sigma^2 / (1 - h)``
    averaged over the ratings of well-rated items: of every user's, or of a seeded
    ``most`` of the users (a mean over their ratings is known to well under 1% from a
    few thousand users, at a fraction of the cost of all of them).
    """
    ib, ix = F.split(F.item)
    offset = np.zeros(len(ix)) if ib is None else ib
    users = None
    if data.shape[0] > most:
        users = np.sort(np.random.default_rng([int(seed), 31]).choice(data.shape[0], most, replace=False))
    total, count = data.leverage(design(ix, ib), offset, lam_user, members, users)
    return sigma2 * total / max(count, 1)


def held_out_set(counts, seed, fraction=0.5, most=400, min_ratings=60, least=100):
    """A seeded half of the well-rated items (``min_ratings`` or more, or the
    ``least`` most-rated), held out to measure the prior."""
    members = np.flatnonzero(well_rated(counts, min_ratings, least))
    n = int(min(most, max(1, round(fraction * len(members)))))
    return np.sort(stream(seed, "prior items").choice(members, n, replace=False))


def em_covariance(grams, rhs, prior_mean, sigma2, Psi, rounds=200, tol=1e-4, weight=None):
    """EM for the covariance of item blocks around known prior means.

    ``grams`` (n, d, d) and ``rhs`` (n, d) are each item's ``B^T B`` and
    ``B^T y`` at fixed users.  With a per-coordinate ``weight`` (n, d) item ``i``'s
    prior covariance is ``S_i^-1 Psi S_i^-1`` (``S_i = diag(sqrt(weight_i))``),
    so ``S_i (z_i - m_i)`` has covariance ``Psi``, which is kept block-diagonal
    over the weight's column groups (the constrained maximum).  Returns the
    converged ``Psi``: no entry moves by more than ``tol`` times the largest in a
    round (1e-4: the variance-scale check that follows moves the prior in steps of
    a quarter).
    """

    n, d = rhs.shape
    s = np.ones((n, d)) if weight is None or np.ndim(weight) == 1 else np.sqrt(weight)
    for _ in range(rounds):
        P = s[:, :, None] * (sigma2 * np.linalg.inv(Psi))[None] * s[:, None, :]
        z, cov = gaussian_posterior(grams, rhs, prior_mean, P, sigma2)
        D = (z - prior_mean) * s
        spread = np.einsum("ni,nij,nj->ij", s, cov, s)
        new = (D.T @ D + spread) / n
        new = 0.5 * (new + new.T) + 1e-9 * np.trace(new) / d * np.eye(d)
        if weight is not None:
            new = block_diagonal(new, weight)
        step = new + 0.8 * (new - Psi)        # over-relaxed: plain EM crawls here
        Psi_next = step if np.linalg.eigvalsh(step).min() > 0 else new
        if np.abs(Psi_next - Psi).max() <= tol * np.abs(Psi).max():
            return Psi_next
        Psi = Psi_next
    warnings.warn(f"the learned prior's EM used all {rounds} rounds before settling (tol {tol:g}); "
                  "the planner's uncertainty may be a little off", ConvergenceWarning, stacklevel=2)
    return Psi


# the check reads neighbour lists among items as the planner forms them, by its default pool rule
POOL_MIN_RATINGS = SETTINGS["plan"]["candidate_min_ratings"].default


@dataclass
class HeldOutFold:
    """One fold of well-rated items held out: what the variance-scale check
    (:mod:`hybrid.core.variance_scales`) and the loop scales read of them, against the users
    re-solved and the map re-fitted without them (the ratings without them are not kept: on
    a cluster they would be a second copy of the users' blocks on every worker)."""

    held: np.ndarray       # the held items' indices
    R: object              # their ratings (CSR rows, r - mu)
    Fe: np.ndarray         # the users' design rows [1, theta_u] fitted without them
    offset: np.ndarray     # the users' biases
    grams: np.ndarray      # per held item, the Gram matrix and right-hand side of its raters
    rhs: np.ndarray
    pool: np.ndarray       # the candidate vectors of neighbour lists
    m: np.ndarray          # the held items' out-of-sample projections


def _fold(problem: Problem, F: Factors, held, n_jobs) -> HeldOutFold:
    """The users re-solved without the ``held`` items' ratings, and the held items'
    statistics against them.

    One exact user step undoes the co-adaptation: each user's vector as if the held items had
    never been rated.  The other items stay as fitted.  Re-fitting items and map in further
    alternating rounds (ten in the previous release) cost most of a default fit's extra
    time and was not needed for calibration: measured together with the settled items of
    :func:`hybrid.core.train._finish`, the single step's MovieLens hide-and-re-solve gaps were at
    or below ten rounds' at every n, and the update loop's and the club's tables stayed within
    their bounds (README, Calibration; Speed and memory).
    """
    out = Problem.of(problem.data.without(held), problem.A, lam_user=problem.lam_user, lam_map=problem.lam_map,
                     weight=problem.weight)
    G = Factors(F.user.copy(), F.item, F.W, F.P, F.biases)      # the user step writes users only
    user_step(out.data, G, out.lam_user, n_jobs)
    W = out.solver.with_penalty(problem.lam_map).solve(F.item[out.rated], F.P)   # the map without them
    ub, ut = G.split(G.user)
    R = problem.data.item_rows(held)
    Fe = design(ut, ub)
    offset = np.zeros(len(ut)) if ub is None else ub
    grams, rhs = row_grams(R.indptr, R.indices, R.data, Fe, offset)
    off = 1 if G.biases else 0
    pool = np.flatnonzero(out.data.item_counts() >= POOL_MIN_RATINGS)
    return HeldOutFold(held, R, Fe, offset, grams, rhs, F.item[pool, off:], np.asarray(problem.A[held] @ W))


def learn_prior(problem: Problem, F: Factors, sigma2, seed, n_jobs=1, recalibrate=True, folds=2):
    """The item prior precision ``P = sigma^2 Psi^-1``, ``Psi`` cross-fitted (module doc).

    The well-rated items are split into ``folds``; each fold is held out in
    turn.  With ``recalibrate`` the prior and noise scales are checked on the
    held-out items too (:mod:`hybrid.core.variance_scales`).  Returns ``(Psi, sigma2_new,
    (kappa_prior, kappa_noise), folds)``: the prior covariance and the variance of a
    new rating, both recalibrated, and the held-out folds (for :func:`loop_scale`).
    """
    weight = problem.weight
    held = held_out_set(problem.data.item_counts(), seed, fraction=1.0, most=400 * folds)
    parts = [_fold(problem, F, h, n_jobs) for h in np.array_split(held, folds) if len(h)]
    cat = lambda key: np.concatenate([getattr(f, key) for f in parts])
    Psi = em_covariance(cat("grams"), cat("rhs"), cat("m"), sigma2, sigma2 * np.linalg.inv(F.P),
                        weight=weight[cat("held")] if np.ndim(weight) == 2 else None)
    scales = (1.0, 1.0)
    if recalibrate and all(len(f.pool) > 40 for f in parts):
        scales = variance_scales(parts, Psi, sigma2, 1 if F.biases else 0, seed=seed, n_jobs=n_jobs)
    kp, kn = scales
    return kp * Psi, kn * sigma2, scales, parts
