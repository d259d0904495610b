"""Check the posterior's two variance scales on held-out items, and correct them.

A Gaussian posterior with a plug-in noise variance and an estimated prior
can still be too sure of itself on real ratings (heavy tails, raters whose
own vectors are uncertain, popular items that differ from the rest).  The
planner's numbers must be true, so before they are used the two scales are
checked the way the calibration report checks them: on the held-out items
of :mod:`hybrid.core.prior` (never on items a calibration run probes), hide all
but ``n`` ratings, re-solve, and compare the predicted stability with the
actual overlap against the full-data list.  ``kappa_prior`` scales the
prior covariance (fitted at ``n = 0``), ``kappa_noise`` the noise variance
(fitted at ``n = 20`` and ``40``), each chosen from a small grid.  The noise scale was fitted
at 10 and 20 until the calibration tables showed the planner too sure at 40 ratings on
MovieLens (gap 0.051): fitted where the planner's numbers are read for items that have a few
dozen ratings, every gap of that table came within 0.04, the tasting club's within 0.05.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from hybrid.common.seeds import stream
from hybrid.core.blocks import row_grams
from hybrid.core.neighbours import nearest
from hybrid.core.posterior import draw_factor, gaussian_posterior, overlap_of_lists, stability

GRID = (0.5, 0.75, 1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0)


def first_n_mask(indptr, n, seed):
    """For each CSR row, keep a seeded random ``n`` of its entries (the same entries first
    for every ``n``, so that the lists at each ``n`` grow from one another)."""
    rows = np.repeat(np.arange(len(indptr) - 1), np.diff(indptr))
    key = stream(seed, "variance ratings").random(len(rows))
    order = np.lexsort((key, rows))
    rank = np.empty(len(rows), dtype=np.int64)
    rank[order] = np.arange(len(rows)) - indptr[rows[order]]
    return rank < n


def _sub_stats(R, Fe, offset, n, seed):
    keep = first_n_mask(R.indptr, n, seed)
    counts = np.bincount(np.repeat(np.arange(R.shape[0]), np.diff(R.indptr))[keep], minlength=R.shape[0])
    # rebuild CSR without the dropped entries (row_grams reads every stored entry)
    indptr = np.concatenate([[0], np.cumsum(counts)])
    return row_grams(indptr, R.indices[keep], R.data[keep], Fe, offset)


def _posterior(grams, rhs, m, Psi, s2):
    return gaussian_posterior(grams, rhs, m, s2 * np.linalg.inv(Psi), s2)


def _gap(packets, m_list, Psi, s2, k, eps, off, n_jobs=1):
    """Mean over ``n`` of |predicted - actual| stability, pooled over the folds."""
    sums = None
    for (stats, full, pool), m in zip(packets, m_list):
        zf, Sf = _posterior(*full, m, Psi, s2)
        lists = nearest(zf[:, off:], pool, k)[0]
        rows = []
        for grams, rhs in stats:
            z, S = _posterior(grams, rhs, m, Psi, s2)
            C = (S - Sf)[:, off:, off:]
            L = draw_factor(C)
            predicted = stability(z[:, off:], L, pool, k, eps, n_jobs=n_jobs)[0].sum()
            actual = overlap_of_lists(nearest(z[:, off:], pool, k)[0], lists).sum()
            rows.append((predicted, actual, len(z)))
        rows = np.array(rows)
        sums = rows if sums is None else sums + rows
    return float(np.mean(np.abs(sums[:, 0] - sums[:, 1]) / sums[:, 2]))


def grid_descent(gap, grid=GRID, start=1.0):
    """The grid value with the least ``gap``, found by walking downhill from ``start``.

    Predicted stability falls as a scale grows, so each ``n``'s gap
    ``|predicted - actual|`` has one valley over the grid; the walk finds it with
    three to six evaluations where the full grid takes nine.  Ties keep the value
    nearer ``start``.

    >>> calls = []
    >>> grid_descent(lambda c: calls.append(c) or abs(c - 2.4))
    2.5
    >>> calls
    [1.0, 1.25, 1.5, 2.0, 2.5, 3.0]
    """
    seen = {}

    def at(j):
        if j not in seen:
            seen[j] = gap(grid[j])
        return seen[j]

    j = grid.index(start)
    best = at(j)
    for step in (1, -1):
        moved = False
        while 0 <= j + step < len(grid) and at(j + step) < best:
            j, best, moved = j + step, seen[j + step], True
        if moved:
            break
    return float(grid[j])


def _subset(fold, most, rng):
    """At most ``most`` of a fold's held-out items (a seeded draw): two scalars need far
    fewer than every held-out item, and the check's cost grows with them."""
    n = fold.R.shape[0]
    if n <= most:
        return fold
    keep = np.sort(rng.choice(n, most, replace=False))
    return replace(fold, R=fold.R[keep], grams=fold.grams[keep], rhs=fold.rhs[keep], m=fold.m[keep])


# Draws per held-out item: the scales are read off a mean over about 200 items, whose Monte
# Carlo error with 32 draws each (about 0.003 in overlap) is far below the gaps between grid
# points; 64 cost twice as much and did not pick the scales more steadily over seeds (the
# held-out items drawn move the pick more than the draws do).
DRAWS = 32


def variance_scales(folds, Psi, sigma2, off, k=10, draws=DRAWS, seed=0, low_n=(0,), high_n=(20, 40), most=100,
                    n_jobs=1):
    """``(kappa_prior, kappa_noise)`` that make predicted and actual stability agree.

    ``folds`` are the held-out folds (:class:`hybrid.core.prior.HeldOutFold`): each
    holds its items' ratings ``R`` (CSR rows, ``r - mu``), the users' design
    ``Fe`` and biases ``offset`` fitted without them, their out-of-sample
    projections ``m`` and the candidate vectors ``pool``; at most ``most`` of
    each fold's items are used.
    """
    folds = [_subset(f, most, stream(seed, "variance subsets", j)) for j, f in enumerate(folds)]
    eps = stream(seed, "variance draws").standard_normal((draws, folds[0].pool.shape[1]))
    m_list = [f.m for f in folds]

    def packets(ns):
        return [([_sub_stats(f.R, f.Fe, f.offset, n, seed) for n in ns], (f.grams, f.rhs), f.pool) for f in folds]

    low, high = packets(low_n), packets(high_n)
    kp = grid_descent(lambda c: _gap(low, m_list, c * Psi, sigma2, k, eps, off, n_jobs))
    kn = grid_descent(lambda c: _gap(high, m_list, kp * Psi, c * sigma2, k, eps, off, n_jobs))
    return float(kp), float(kn)

