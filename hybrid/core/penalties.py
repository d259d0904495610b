"""The penalties chosen on held-out ratings: how hard to shrink users, items and the map.

A fixed penalty serves one rank on one catalogue.  The same ``lam_user = 5``
that suits four dimensions lets thirty-two fit noise, so the error climbs
with the rank (on MovieLens latest-small from 0.857 at rank 4 to about 1.0
at rank 32), while a penalty that grows with the rank keeps the extra
dimensions small and harmless.  Rather than ask the user to tune them,
``lam_user``, ``lam_item`` and ``lam_map`` default to ``"auto"``: a seeded
tenth of the training ratings is kept aside, the model is fitted at its rank
on the rest (fixed prior ``lam_item * I``), and a coordinate search on a
grid of powers of two keeps, for one penalty at a time, the value with the
lowest error on the kept-aside ratings.  Each trial is warm-started from the
best model so far, so a trial costs a few epochs.  Choosing penalties on
held-out data is common practice (cross-validated regularisation, as in the
ridge and lasso paths of Hastie, Tibshirani and Friedman, *The Elements of
Statistical Learning*, 2009, ch. 3 and 7).

On a large catalogue the search runs on a seeded set of whole users holding
about ``most`` ratings (100,000 by default; every rating when there are fewer).
In the Bayesian reading of ridge regression (common practice) a penalty is
the noise variance over the prior's, ``sigma^2 / tau^2``: a property of how
ratings and tastes vary rather than of how many ratings there are, so a
sample of users can estimate it at a fraction of the cost.  Whole users keep
each user's own count; items do see fewer ratings in the sample, so the
reading is checked, not assumed: on MovieLens a search on half or a quarter
of the users matched the full search's held-out RMSE (README, "Speed and
memory").

The kept-aside ratings of an item whose every rating was kept aside are
predicted from the map alone, so the map penalty is chosen for cold items
too.  A number given for a penalty fixes it and the search leaves it alone.
"""
from __future__ import annotations

import numpy as np

from hybrid.core.ranksearch import held_out, held_rmse
from hybrid.core.steps import Factors, Problem, start_factors
from hybrid.core.train import run_epochs

NAMES = ("lam_user", "lam_item", "lam_map")
START = {"lam_user": 8.0, "lam_item": 8.0, "lam_map": 8.0}
LOWEST, HIGHEST = 2.0 ** -4, 2.0 ** 12


def _trial(problem: Problem, F: Factors, values, epochs, n_jobs):
    """A copy of ``F`` fitted ``epochs`` more epochs under penalties ``values``."""
    G = Factors(F.user.copy(), F.item.copy(), F.W.copy(), values["lam_item"] * np.eye(F.item.shape[1]), F.biases)
    run_epochs(problem.with_penalties(values["lam_user"], values["lam_map"]), G, epochs, 0.0, n_jobs)
    return G


SEARCH_RATINGS = 100_000


def user_sample(users, most, seed):
    """A mask of the ratings of a seeded set of whole users, about ``most`` ratings in all
    (all of them when there are no more than ``most``).

    >>> users = np.repeat(np.arange(10), 100)        # ten users, 100 ratings each
    >>> keep = user_sample(users, 300, seed=0)
    >>> int(keep.sum()), len(np.unique(users[keep]))
    (300, 3)
    """
    users = np.asarray(users)
    if len(users) <= most:
        return np.ones(len(users), bool)
    counts = np.bincount(users)
    order = np.random.default_rng([int(seed), 13]).permutation(len(counts))
    chosen = order[:int(np.searchsorted(np.cumsum(counts[order]), most)) + 1]
    mask = np.zeros(len(counts), bool)
    mask[chosen] = True
    return mask[users]


def choose_penalties(codes, shape, A, *, rank, given, biases, seed, fraction=0.1, epochs=4,
                     start_epochs=10, n_jobs=1, most=SEARCH_RATINGS):
    """The penalties with the lowest held-out RMSE, and the search's path.

    Parameters
    ----------
    codes : (users, items, ratings)
        The training ratings as integer codes and values.
    shape : (n_users, n_items)
    A : sparse (n_items, p)
        Attribute design matrix.
    rank : int
    given : dict
        ``{name: value or "auto"}`` for each of :data:`NAMES`; numbers stay fixed.
    epochs, start_epochs : int
        Epochs of each trial, and of the first fit at the starting values.
    most : int
        About how many ratings the search uses (:func:`user_sample`).

    Returns
    -------
    chosen : dict
        A number for each of :data:`NAMES`.
    path : list of (dict, rmse)
        Every trial, in order (the first is the starting point).

    Examples
    --------
    A penalty given as a number is kept; the others move to where the kept-aside
    ratings are predicted best, and the chosen point is the best one tried:

    >>> from hybrid.datasets.club import tasting_club
    >>> from hybrid.estimator.features import AttributeEncoder
    >>> club = tasting_club(n_members=300, n_lots=60, n_new=0, seed=2)
    >>> A = AttributeEncoder(club.schema).fit(club.lots).transform(club.lots)
    >>> lots = club.lots.index.get_indexer(club.ratings["item"])
    >>> members = np.unique(club.ratings["user"], return_inverse=True)[1]
    >>> codes = (members, lots, club.ratings["rating"].to_numpy(float))
    >>> chosen, path = choose_penalties(codes, (300, 60), A, rank=4, biases=True, seed=0,
    ...     given={"lam_user": "auto", "lam_item": "auto", "lam_map": 3.0})
    >>> chosen["lam_map"], all(p["lam_map"] == 3.0 for p, _ in path)
    (3.0, True)
    >>> min(path, key=lambda p: p[1])[0] == chosen
    True
    """
    keep = user_sample(codes[0], most, seed)
    codes = tuple(np.asarray(c)[keep] for c in codes)
    data, uh, ih, y = held_out(codes, shape, fraction, seed)
    values = {k: START[k] if given[k] == "auto" else float(given[k]) for k in NAMES}
    free = [k for k in NAMES if given[k] == "auto"]
    d = rank + 1 if biases else rank
    F = start_factors(shape[0], shape[1], A.shape[1], d, np.random.default_rng([int(seed), 9]), biases)
    problem = Problem.of(data, A, lam_user=values["lam_user"], lam_map=values["lam_map"])
    F = _trial(problem, F, values, start_epochs, n_jobs)
    best = held_rmse(F, uh, ih, y)
    path = [(dict(values), best)]
    for factor in (4.0, 2.0):       # coarse steps first, then halve them
        moved = True
        while moved:
            moved = False
            for name in free:
                for step in (factor, 1.0 / factor):
                    trial = {**values, name: float(np.clip(values[name] * step, LOWEST, HIGHEST))}
                    if trial[name] == values[name] or any(p == trial for p, _ in path):
                        continue
                    G = _trial(problem, F, trial, epochs, n_jobs)
                    err = held_rmse(G, uh, ih, y)
                    path.append((dict(trial), err))
                    if err < best:
                        values, best, F, moved = trial, err, G, True
                        break       # keep going the same way on the next pass
    return values, path
