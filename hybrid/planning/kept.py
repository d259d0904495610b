"""The number an analyst can check afterwards: how much of an item's list still stands.

*Stability* (:mod:`hybrid.planning.assess`) is the expected overlap of an item's top-k list
with the list it would have once its vector were known, which nobody ever observes.
:func:`expected_kept` is what a campaign can observe: the expected share of an item's
top-k list today that is still in its list after ``more`` further ratings are folded in with
``update`` (:func:`hybrid.estimator.updates.fold_in`).  As ``more`` grows it falls toward
the stability (not quite to it: ``update`` re-solves each new rater first, and the raters
take up part of every surprise).  Both are estimates.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from hybrid.common.limits import check_plan, defaults
from hybrid.core.neighbours import nearest
from hybrid.planning.assess import Assessor

_P = defaults("plan")


def expected_kept(model, items, more, k=_P["k"], *, draws=_P["draws"], seed=_P["seed"],
                  candidate_min_ratings=_P["candidate_min_ratings"], responders=_P["responders"],
                  responder_threshold=None):
    """Expected share of each item's current top-``k`` list that still stands after ``more``
    further ratings (from the responders the planner assumes) are folded in with ``update``.

    Parameters
    ----------
    model : HybridFactorModel
    items : str or list of str
        Item ids.
    more : int or array of int
        Further ratings, one number for all items or one per item.
    k : int
        Length of the neighbour list; the candidates are the planner's (items with
        ``candidate_min_ratings`` ratings or more).

    Returns
    -------
    float or ndarray
        One share per item (a float for one item id).

    Examples
    --------
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=400, n_lots=60, n_new=0, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=6, schema=club.schema).fit(club.ratings, club.lots)
    >>> few, many = expected_kept(m, "L0007", 2, k=5), expected_kept(m, "L0007", 200, k=5)
    >>> bool(1 >= few >= many >= 0)     # more ratings move the list further
    True
    """
    from hybrid.planning.planner import _chosen

    check_plan(k=k, draws=draws, seed=seed, candidate_min_ratings=candidate_min_ratings, responders=responders)
    one = isinstance(items, str)
    where = _chosen(model, [items] if one else list(items))
    more = np.asarray(more, float)
    if more.ndim > 1 or (more.ndim == 1 and len(more) != len(where)) or not np.all(np.isfinite(more)) \
            or np.any(more < 0):
        from hybrid.common.errors import InputError
        raise InputError(f"more must be one whole number >= 0 or one per item ({len(where)}), found {more.tolist()}")
    threshold = None
    if responders == "likely":
        from hybrid.planning.planner import LIKED
        threshold = LIKED if responder_threshold is None else responder_threshold
    A = Assessor(model, k, draws, seed, candidate_min_ratings, responders, threshold)
    shares = A.kept(where, more)[0]
    return float(shares[0]) if one else shares


def current_lists(model, where, pool, k):
    """Each item's top-``k`` among the candidates ``pool`` (itself left out): the lists whose
    share :func:`expected_kept` predicts will stand."""
    off = 1 if model.biases else 0
    V = model.item_blocks_[:, off:]
    return nearest(V[where], V[pool], k, exclude=pd.Index(pool).get_indexer(where))[0]

