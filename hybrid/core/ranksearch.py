"""How many dimensions the ratings support, chosen on held-out ratings.

A factor model with more dimensions than its data supports fits noise: on
sparse ratings its error climbs with the rank, so a user who picks a generous
rank (or keeps the default) would get a worse model than a biases-only one.
Rather than ask the user to tune the rank, the fit treats ``rank`` as the most
dimensions allowed and grows the model along a ladder of ranks (1, 2, 3, 4,
6, 8, ...), each level warm-started from the one before with its new
dimensions added, scored on a seeded share of the ratings kept aside.  The
search stops after ``patience`` levels without improvement; the rank with the
lowest held-out error is the fitted one (``rank_``).  Choosing the capacity on
held-out data is common practice (cross-validated model selection); growing
it one level at a time keeps the cost to a few epochs per level.

Because the ladder is the same for every ``rank``, a search that stops below
``rank`` gives the same fit for any larger ``rank``: past the point the data
supports, a larger rank changes nothing (a test checks).  Rank 0 (biases
only) is not a candidate: the search's smallest model still has one vector
dimension, which its penalty keeps small when it does not help.

The levels are fitted with the given penalties, or the starting values of
the penalty search (:data:`hybrid.core.penalties.START`) where they are ``"auto"``,
and the penalties are then chosen at the rank found.  A fixed stronger
penalty was tried and rejected: heavily shrunk extra dimensions keep helping a
little, and on the tasting club (planted rank 5) the search then ran to rank
24.  Measured with the release before penalties were chosen on held-out
ratings, it stopped at 1 to 2 on MovieLens latest-small where fixed ranks 2,
4 and 8 fitted better (0.869, 0.857, 0.874 against 0.881 on one warm fold),
so the search is opt-in (``rank_choice = "held-out"``).  With the chosen
penalties the default fixed rank is already harmless when generous: the warm
RMSE falls from rank 2 to rank 32 and is flat to 64 (README's rank curve).
"""
from __future__ import annotations

import numpy as np

from hybrid.core.steps import Factors, Problem, RatingData, start_factors
from hybrid.core.train import run_epochs

LADDER = (1, 2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64, 96, 128)


def ladder(most: int) -> list[int]:
    """The ranks tried for a model of at most ``most`` dimensions (``most`` always last).

    >>> ladder(5), ladder(16), ladder(200)[-3:]
    ([1, 2, 3, 4, 5], [1, 2, 3, 4, 6, 8, 12, 16], [128, 192, 200])
    """
    steps = [r for r in LADDER if r < most]
    while steps and steps[-1] >= LADDER[-1] and int(steps[-1] * 1.5) < most:
        steps.append(int(steps[-1] * 1.5))
    return steps + [int(most)]


def validation_split(n: int, fraction: float, seed: int) -> np.ndarray:
    """A seeded boolean mask of ``fraction`` of ``n`` ratings (its own random stream)."""
    return np.random.default_rng([int(seed), 7]).random(n) < fraction


def held_out(codes, shape, fraction, seed):
    """The training part as :class:`RatingData`, and the kept-aside codes and centred ratings.

    Returns ``(data, u_held, i_held, y_held)``; shared by the rank and the penalty search so
    both keep the same ratings aside for the same seed.
    """
    u, i, r = (np.asarray(c) for c in codes)
    held = validation_split(len(r), fraction, seed)
    data = RatingData.from_codes(u[~held], i[~held], r[~held], *shape)
    return data, u[held], i[held], r[held] - data.mu


def held_rmse(F, u, i, y):
    """RMSE of ratings ``y`` (less the mean) at codes ``u``, ``i``."""
    pred = np.einsum("nk,nk->n", F.user[u], F.item[i]) if not F.biases else (
        np.einsum("nk,nk->n", F.user[u, 1:], F.item[i, 1:]) + F.user[u, 0] + F.item[i, 0])
    return float(np.sqrt(np.mean((y - pred) ** 2)))


def _widen(F, d, rng, n_features):
    """``F`` with zero user columns and small random item columns added up to ``d``."""
    k = d - F.item.shape[1]
    n_users, n_items = len(F.user), len(F.item)
    return Factors(user=np.hstack([F.user, np.zeros((n_users, k))]),
                   item=np.hstack([F.item, rng.normal(0.0, 0.1, (n_items, k))]),
                   W=np.hstack([F.W, np.zeros((n_features, k))]), P=F.P, biases=F.biases)


def search_rank(codes, shape, A, *, most, lam_user, lam_item, lam_map, biases, seed, fraction=0.1,
                epochs=8, patience=2, n_jobs=1, min_gain=0.0):
    """Grow a model along :func:`ladder` and return ``(rank, path)``.

    Parameters
    ----------
    codes : (users, items, ratings)
        The training ratings as integer codes and values.
    shape : (n_users, n_items)
    A : sparse (n_items, p)
        Attribute design matrix.
    most : int
        Most dimensions (the model's ``rank``).
    lam_user, lam_item, lam_map : float
        The levels' penalties (module doc).
    fraction : float
        Share of the ratings held out to score each level.

    Returns
    -------
    rank : int
        The level with the lowest held-out RMSE.
    path : list of (rank, rmse)
        Every level tried, in order.

    Examples
    --------
    >>> from hybrid.datasets.club import tasting_club
    >>> from hybrid.estimator.features import AttributeEncoder
    >>> club = tasting_club(n_members=300, n_lots=60, n_new=0, seed=2)
    >>> A = AttributeEncoder(club.schema).fit(club.lots).transform(club.lots)
    >>> lots = club.lots.index.get_indexer(club.ratings["item"])
    >>> members = np.unique(club.ratings["user"], return_inverse=True)[1]
    >>> codes = (members, lots, club.ratings["rating"].to_numpy(float))
    >>> rank, path = search_rank(codes, (300, 60), A, most=3, lam_user=5.0, lam_item=5.0,
    ...                        lam_map=1.0, biases=True, seed=0)
    >>> [r for r, _ in path], rank == min(path, key=lambda p: p[1])[0]
    ([1, 2, 3], True)
    """
    data, uh, ih, y = held_out(codes, shape, fraction, seed)
    rng = np.random.default_rng([int(seed), 8])
    problem = Problem.of(data, A, lam_user=lam_user, lam_map=lam_map)
    F, best, path, stale = None, None, [], 0
    for rank in ladder(most):
        d = rank + 1 if biases else rank
        if F is None:
            F = start_factors(shape[0], shape[1], A.shape[1], d, rng, biases, lam_item * np.eye(d))
        else:
            F = _widen(F, d, rng, A.shape[1])
            F.P = lam_item * np.eye(d)
        run_epochs(problem, F, epochs, 0.0, n_jobs)
        err = held_rmse(F, uh, ih, y)
        path.append((rank, err))
        if best is None or err < best[1] * (1.0 - min_gain):
            best, stale = (rank, err), 0
        else:
            stale += 1
            if stale >= patience:
                break
    # the final fit starts afresh at the chosen rank: started from this level's blocks
    # (fitted on less data, without the learned prior) it settled worse on MovieLens
    return best[0], path
