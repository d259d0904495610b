"""Related items: the neighbours of a model's items, the closest by distance between item vectors
(the kernel is :func:`hybrid.core.neighbours.nearest`)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError
from hybrid.core.neighbours import nearest


def related(model, items, k: int = 5, metric: str = "euclidean", among=None,
            attributes: pd.DataFrame | None = None) -> pd.DataFrame:
    """Nearest items to ``items`` among the model's items (rated and projected).

    Parameters
    ----------
    model : HybridFactorModel
    items : list of str
        Known items, or new ones described by ``attributes``.
    k : int
    metric : {'euclidean', 'cosine'}
    among : list of str, optional
        Restrict the candidates to these known items.

    Returns
    -------
    DataFrame with columns ``item``, ``position`` (1 = the closest), ``neighbour``, ``distance``.

    Examples
    --------
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=2, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=3, schema=club.schema).fit(club.ratings, club.lots)
    >>> related(m, ["L0001"], k=3)["position"].tolist()
    [1, 2, 3]
    """
    if not isinstance(k, (int, np.integer)) or k < 1:
        raise InputError(f"k must be a whole number >= 1, found {k!r}")
    items = np.atleast_1d(np.asarray(items, dtype=str))
    ids = model.item_ids_
    if among is None:
        cand = np.arange(len(ids))
    else:
        among = np.asarray(among, dtype=str)
        cand = pd.Index(ids).get_indexer(among)
        if (cand < 0).any():
            raise InputError(f"candidate item '{among[np.argmax(cand < 0)]}' is not in the model")
    q = model.blocks_for_items(items, attributes)[:, 1 if model.biases else 0:]
    C = model.item_blocks_[cand][:, 1 if model.biases else 0:]
    self_pos = pd.Index(ids[cand]).get_indexer(items)
    idx, dist = nearest(q, C, k, metric, exclude=self_pos)
    kk = idx.shape[1]
    return pd.DataFrame({"item": np.repeat(items, kk), "position": np.tile(np.arange(1, kk + 1), len(items)),
                         "neighbour": ids[cand][idx.ravel()], "distance": dist.ravel()})
