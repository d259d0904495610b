"""Read-only views of a fitted model (its blocks, map, prior and fingerprint), a mixin of
:class:`hybrid.estimator.model.HybridFactorModel`; every one raises ``NotFittedError`` before
``fit`` (so ``hasattr`` says no), and none writes fitted state."""
from __future__ import annotations

import hashlib

import numpy as np
from sklearn.exceptions import NotFittedError

from hybrid.core.steps import Factors


class FittedViews:
    def check_fitted(self) -> Factors:
        """The fitted blocks, or :class:`NotFittedError` before ``fit``."""
        if "factors_" not in self.__dict__:
            raise NotFittedError("this model is not fitted yet; call fit() first")
        return self.factors_

    @property
    def item_blocks_(self):
        """Rows ``[b_i, x_i]`` of every known item."""
        return self.check_fitted().item

    @property
    def user_blocks_(self):
        """Rows ``[b_u, theta_u]`` of every known user."""
        return self.check_fitted().user

    @property
    def fingerprint_(self):
        """16 hex digits of a SHA-256 over the ids, the fitted blocks and the rating counts:
        what a plan was made from, so a report can refuse a plan from another model (or from
        this model before an ``update``)."""
        F = self.check_fitted()
        h = hashlib.sha256()
        for part in (self.user_ids_, self.item_ids_):
            h.update("\x1f".join(map(str, part)).encode("utf-8") + b"\x1e")
        for array in (F.user, F.item, self.item_counts_):
            h.update(np.ascontiguousarray(array, dtype=np.float64).tobytes())
        return h.hexdigest()[:16]

    @property
    def map_(self):
        """The attribute map ``W`` (features x block)."""
        return self.check_fitted().W

    @property
    def prior_precision_(self):
        """Item prior precision ``P`` of the fit (block x block); the prior covariance is
        :attr:`prior_covariance_` = ``sigma2_ * P^-1``."""
        return self.check_fitted().P

    @property
    def prior_covariance_(self):
        """How far an item's block falls from its attribute projection (covariance): the
        learned spread with ``prior='learned'``, else ``sigma2_ * P^-1``."""
        F = self.check_fitted()
        return F.spread if F.spread is not None else self.sigma2_ * np.linalg.inv(F.P)

    @property
    def dimension_spread_(self):
        """Standard deviation of the item prior along each of its principal directions,
        largest first (the bias left out): how much each dimension carries once the
        attributes are known.  Principal directions, because a factor basis is only
        fixed up to a rotation and the prior's own axes are not."""
        Psi = self.prior_covariance_[1:, 1:] if self.biases else self.prior_covariance_
        return np.sqrt(np.clip(np.linalg.eigvalsh(Psi), 0.0, None))[::-1]

    @property
    def dimensions_with_signal_(self):
        """The fewest principal directions that hold 90% of the item prior's variance.

        A rank larger than the data supports leaves its extra directions with almost
        no spread, so this count stays put as the rank grows (an explained-variance
        cut, as in principal components; common practice, the 90% is our choice).
        """
        var = self.dimension_spread_ ** 2
        return int(np.searchsorted(np.cumsum(var) / max(var.sum(), 1e-300), 0.9) + 1)

    @property
    def new_rating_precision_(self):
        """The prior precision on the scale of a new rating, ``sigma2_new_ * Psi^-1``:
        what an item solved from ratings its raters were not fitted to uses."""
        return self.sigma2_new_ * np.linalg.inv(self.prior_covariance_)
