"""Baselines the hybrid is compared with, each fitted on its own and tuned on validation data.

Every baseline takes the same input as the hybrid (a ratings table with
``user``, ``item``, ``rating`` and an attribute design matrix over all items)
and predicts for (user, item) codes.  Each says what it uses.
"""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from sklearn.preprocessing import normalize


class _Base:
    uses = ""
    grid: tuple = (None,)

    def __init__(self, param=None):
        self.param = param

    def _bias(self, u, i, r, n_users, lam=5.0):
        self.mu_ = float(r.mean())
        n_u = np.bincount(u, minlength=n_users)
        self.b_u_ = np.bincount(u, weights=r - self.mu_, minlength=n_users) / (n_u + lam)
        return r - self.mu_ - self.b_u_[u]


class GlobalMean(_Base):
    """The mean of all training ratings."""

    name, uses = "global mean", "ratings only"

    def fit(self, u, i, r, A, n_users):
        self.mu_ = float(r.mean())
        return self

    def predict(self, u, i):
        return np.full(len(u), self.mu_)


class UserBias(_Base):
    """Global mean plus a shrunk user bias."""

    name, uses = "mean + user bias", "ratings only"
    grid = (1.0, 3.0, 10.0, 30.0)

    def fit(self, u, i, r, A, n_users):
        self._bias(u, i, r, n_users, self.param)
        return self

    def predict(self, u, i):
        return self.mu_ + self.b_u_[u]


class Biases(_Base):
    """Mean + user bias + item bias, a ridge fit of both (alternating, to convergence);
    an unrated item's bias is zero.  The usual biases-only model (common practice)."""

    name, uses = "mean + user + item biases", "ratings only"
    grid = (1.0, 3.0, 10.0, 30.0)

    def fit(self, u, i, r, A, n_users, sweeps=500):
        self.mu_ = float(r.mean())
        n_items = A.shape[0]
        n_u = np.bincount(u, minlength=n_users)
        n_i = np.bincount(i, minlength=n_items)
        res = r - self.mu_
        self.b_i_ = np.zeros(n_items)
        for _ in range(sweeps):  # exact block minimisation: each sweep lowers the ridge objective
            self.b_u_ = np.bincount(u, weights=res - self.b_i_[i], minlength=n_users) / (n_u + self.param)
            b_i = np.bincount(i, weights=res - self.b_u_[u], minlength=n_items) / (n_i + self.param)
            done = np.abs(b_i - self.b_i_).max() < 1e-8
            self.b_i_ = b_i
            if done:
                break
        return self

    def predict(self, u, i):
        return self.mu_ + self.b_u_[u] + self.b_i_[i]


class AttributeBias(_Base):
    """Mean + user bias + an item bias regressed from attributes (own bias when rated)."""

    name, uses = "+ item bias from attributes", "ratings, attributes"
    grid = (0.3, 1.0, 3.0, 10.0, 30.0, 100.0)

    def fit(self, u, i, r, A, n_users, lam_item=5.0):
        res = self._bias(u, i, r, n_users)
        n_items = A.shape[0]
        n_i = np.bincount(i, minlength=n_items).astype(float)
        d = np.bincount(i, weights=res, minlength=n_items) / (n_i + lam_item)
        rated = n_i > 0
        w = n_i[rated] / (n_i[rated] + lam_item)      # well-rated items weigh more on the regression
        Ar = A[rated]
        G = (Ar.T @ Ar.multiply(w[:, None])).toarray() + self.param * np.eye(A.shape[1])
        self.w_ = np.linalg.solve(G, Ar.T @ (w * d[rated]))
        prior = np.asarray(A @ self.w_).ravel()
        # an item's own ratings move it from the regression toward its own mean
        self.b_i_ = (np.bincount(i, weights=res, minlength=n_items) + lam_item * prior) / (n_i + lam_item)
        return self

    def predict(self, u, i):
        return self.mu_ + self.b_u_[u] + self.b_i_[i]


class AttributeNeighbours(_Base):
    """Mean + user bias + the similarity-weighted bias of the K rated items most alike
    in attributes (cosine over the design matrix)."""

    name, uses = "attribute neighbours", "ratings, attributes"
    grid = (5, 10, 20, 50)

    def fit(self, u, i, r, A, n_users, lam_item=5.0):
        res = self._bias(u, i, r, n_users)
        n_items = A.shape[0]
        n_i = np.bincount(i, minlength=n_items).astype(float)
        d = np.bincount(i, weights=res, minlength=n_items) / (n_i + lam_item)
        rated = np.flatnonzero(n_i > 0)
        X = normalize(sp.csr_matrix(A)[:, 1:])            # the intercept says nothing about likeness
        k = min(self.param, len(rated))
        near = np.zeros(n_items)
        step = max(1, (1 << 22) // max(len(rated), 1))
        for s in range(0, n_items, step):                  # blocks of items x rated items
            S = np.asarray((X[s:s + step] @ X[rated].T).todense())
            own = rated[None, :] == np.arange(s, min(s + step, n_items))[:, None]
            S[own] = -np.inf                               # an item is not its own neighbour
            top = np.argpartition(-S, k - 1, axis=1)[:, :k]
            sim = np.maximum(np.take_along_axis(S, top, 1), 0.0)
            nb = d[rated[top]]
            near[s:s + step] = (sim * nb).sum(1) / np.maximum(sim.sum(1), 1e-12)
        # an item's own ratings move it from its neighbours' bias toward its own mean
        self.b_i_ = (np.bincount(i, weights=res, minlength=n_items) + lam_item * near) / (n_i + lam_item)
        return self

    def predict(self, u, i):
        return self.mu_ + self.b_u_[u] + self.b_i_[i]


BASELINES = (GlobalMean, UserBias, Biases, AttributeBias, AttributeNeighbours)
