"""Scores from a fitted model: item blocks (known, or projected from attributes), predictions
and the item x user score matrix.  A mixin of :class:`hybrid.estimator.model.HybridFactorModel`, kept
apart so that the model module holds the fit and its state."""
from __future__ import annotations

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError
from hybrid.estimator.explain import item_positions
from hybrid.io.tables import validate_attributes


class Scores:
    """Prediction methods of a fitted :class:`~hybrid.estimator.model.HybridFactorModel`."""

    def clip(self, scores):
        """Scores limited to the range of ratings seen in training (for display and
        expected ratings; the raw scores keep their linear structure)."""
        return np.clip(scores, *self.rating_range_)

    def blocks_for_items(self, items, attributes=None, clip_numbers=False):
        """The blocks of ``items``: a rated item's fitted block; an item without ratings
        projected from its row of ``attributes`` when it has one (the table given is the truth
        for what an unrated item is: an edited price or process is scored as edited), else
        the block the model holds; an item the model does not know needs a row."""
        F = self.check_fitted()
        items = np.asarray(items, dtype=str)
        pos, _, from_row = item_positions(self, items, attributes)
        z = np.empty((len(items), F.item.shape[1]))
        z[~from_row] = F.item[pos[~from_row]]
        if from_row.any():
            z[from_row] = self._project_blocks(attributes.loc[items[from_row]], clip_numbers)
        return z

    def attributes_changed(self, attributes: pd.DataFrame) -> np.ndarray:
        """For each row of ``attributes``: whether the model knows the item and its encoded
        attributes differ from those the model holds for it (a corrected price, say)."""
        self.check_fitted()
        pos = pd.Index(self.item_ids_).get_indexer(attributes.index.astype(str))
        changed = np.zeros(len(pos), bool)
        known = np.flatnonzero(pos >= 0)
        if known.size:
            diff = self.features_.transform(attributes.iloc[known]) - self.attributes_[pos[known]]
            changed[known] = np.asarray(abs(diff).max(axis=1).todense()).ravel() > 1e-9
        return changed

    def _project_blocks(self, attributes, clip_numbers=False):
        return self.launch_blocks(self.features_.transform(attributes, clip_numbers=clip_numbers))

    def launch_blocks(self, A):
        """Prior means of new items from their attribute rows: projection plus launch offset."""
        z = np.asarray(A @ self.check_fitted().W)
        if self.biases:
            z[:, 0] += self.launch_offset_
        return z

    def project(self, attributes: pd.DataFrame) -> pd.DataFrame:
        """Projected blocks ``W^T a`` of items from their attributes alone (the bias
        plus ``launch_offset_``: the prior mean of a new item).

        Returns a DataFrame indexed by item with ``bias`` and ``f0..f{rank_-1}``.
        """
        self.check_fitted()
        attributes = validate_attributes(attributes, None, self.features_.spec(), source="attributes",
                                         require_all=False)
        z = self._project_blocks(attributes)
        return self._frame(z, attributes.index)

    def _frame(self, z, index):
        cols = (["bias"] if self.biases else []) + [f"f{j}" for j in range(self.rank_)]
        return pd.DataFrame(z, index=pd.Index(np.asarray(index, dtype=str), name="item"), columns=cols)

    def item_vectors(self) -> pd.DataFrame:
        """Blocks of every known item (rated ones fitted, unrated ones projected)."""
        return self._frame(self.check_fitted().item, self.item_ids_)

    def _user_rows(self, users):
        F = self.check_fitted()
        users = np.asarray(users, dtype=str)
        pos = np.searchsorted(self.user_ids_, users)
        pos = np.minimum(pos, len(self.user_ids_) - 1)
        known = self.user_ids_[pos] == users
        # an unknown user has the prior block (zeros): predictions fall back to mu + b_i
        return np.where(known[:, None], F.user[pos], 0.0)

    def predict_codes(self, F, mu, u, i):
        ub, ut = F.split(F.user)
        ib, ix = F.split(F.item)
        pred = mu + np.einsum("nk,nk->n", ut[u], ix[i])
        return pred + (ub[u] + ib[i] if ub is not None else 0.0)

    def combine(self, wu, zi):
        self.check_fitted()
        if not self.biases:
            return self.mu_ + np.einsum("nk,nk->n", wu, zi)
        return self.mu_ + wu[:, 0] + zi[:, 0] + np.einsum("nk,nk->n", wu[:, 1:], zi[:, 1:])

    def predict(self, users, items, attributes: pd.DataFrame | None = None) -> np.ndarray:
        """Expected ratings for pairs ``(users[n], items[n])``.

        Items the model has never seen are projected from ``attributes``;
        users it has never seen get the population block (``mu + b_i``).
        """
        users, items = np.asarray(users, dtype=str), np.asarray(items, dtype=str)
        if users.shape != items.shape:
            raise InputError(f"users and items must have the same length, found {users.size} and {items.size}")
        return self.combine(self._user_rows(users), self.blocks_for_items(items, attributes))

    def score_blocks(self, z: np.ndarray, chunk: int = 2048):
        """Yield ``(start, block)`` of the item x user score matrix for blocks ``z``."""
        F = self.check_fitted()
        ub, ut = F.split(F.user)
        ib, ix = F.split(z)
        for s in range(0, len(z), chunk):
            block = self.mu_ + ix[s:s + chunk] @ ut.T
            if ub is not None:
                block += ib[s:s + chunk, None] + ub[None, :]
            yield s, block

    def score_matrix(self, items, attributes: pd.DataFrame | None = None, chunk: int = 2048) -> np.ndarray:
        """The item x user matrix ``mu + b_i + b_u + X Theta^T`` for ``items``.

        Computed ``chunk`` items at a time; callers that need many items
        should iterate :meth:`score_blocks` instead of holding it all.
        """
        z = self.blocks_for_items(items, attributes)
        out = np.empty((len(z), len(self.user_ids_)))
        for s, block in self.score_blocks(z, chunk):
            out[s:s + len(block)] = block
        return out
