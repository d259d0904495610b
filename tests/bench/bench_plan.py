"""Benchmark: plan 5,000 under-covered items against a pool of 20,000 trusted items (rank 32, 64 draws).

Plans the under-covered items only (``plan(..., items=...)``), every trusted
item a neighbour candidate.  Prints the planner's seconds and peak memory
(targets: under 30 s and 2 GB on 2 cores), and, as a reference measured in the
same run, the seconds per item of ranking every draw against the whole pool
with dense numpy (distance table, partition), as a ratio.

Run:  python tests/bench/bench_plan.py [TRUSTED COVERED]   (default 20000 5000)
"""
from __future__ import annotations

import resource
import time

import numpy as np
import pandas as pd

from hybrid import HybridFactorModel
from hybrid.core.posterior import draw_factor, vector_part
from hybrid.planning.assess import Assessor
from hybrid.planning.planner import plan


def catalogue(seed=0, trusted=20_000, covered=5_000, users=30_000, rank=32):
    rng = np.random.default_rng(seed)
    n_items = trusted + covered
    X = rng.normal(0, 0.5, (n_items, rank))
    T = rng.normal(0, 0.5, (users, rank))
    counts = np.concatenate([rng.integers(25, 41, trusted), rng.integers(1, 6, covered)])
    i = np.repeat(np.arange(n_items), counts)
    u = rng.integers(0, users, len(i))
    keep = ~pd.Series(u * n_items + i).duplicated().to_numpy()
    u, i = u[keep], i[keep]
    r = np.clip(3.5 + np.einsum("nk,nk->n", T[u], X[i]) + rng.normal(0, 0.7, len(i)), 1, 5)
    ids = np.array([f"I{j:05d}" for j in range(n_items)])
    ratings = pd.DataFrame({"user": [f"U{x:05d}" for x in u], "item": ids[i], "rating": r})
    attrs = pd.DataFrame({"kind": rng.integers(0, 50, n_items).astype(str)}, index=pd.Index(ids, name="item"))
    return ratings, attrs


def brute_force(means, chol, pool, eps, exclude, k=10):
    """Reference: every draw against the whole pool with dense numpy (distance table, partition)."""
    D0 = ((means[:, None, :] - pool[None]) ** 2).sum(-1)
    D0[exclude >= 0, exclude[exclude >= 0]] = np.inf               # an item is not its own neighbour
    listed = np.argsort(D0, axis=1)[:, :k]
    out = np.empty(len(means))
    for b, (mean, L) in enumerate(zip(means, chol)):
        X = mean + eps @ L.T
        D = (X ** 2).sum(1)[:, None] + (pool ** 2).sum(1)[None, :] - 2.0 * X @ pool.T
        if exclude[b] >= 0:
            D[:, exclude[b]] = np.inf
        kth = np.partition(D, k - 1, axis=1)[:, k - 1]
        out[b] = (np.take_along_axis(D, np.repeat(listed[b:b + 1], len(X), 0), 1) <= kth[:, None]).mean()
    return out


def main():
    import sys

    sizes = [int(x) for x in sys.argv[1:3]] or [20_000, 5_000]
    ratings, attrs = catalogue(trusted=sizes[0], covered=sizes[1], users=max(3 * sizes[0] // 2, 2000))
    t0 = time.perf_counter()
    model = HybridFactorModel(rank=32, epochs=6, prior="fixed", lam_map=1.0, schema={"kind": "category"},
                              n_jobs=2).fit(ratings, attrs)
    print(f"trained {len(ratings):,} ratings in {time.perf_counter() - t0:.1f} s")
    covered = model.item_ids_[model.item_counts_ < 20]
    t0 = time.perf_counter()
    result = plan(model, k=10, draws=64, candidate_min_ratings=20, items=covered)
    seconds = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    items = result.items
    print(f"planned {len(items):,} under-covered items ({int(items['needed'].notna().sum()):,} can reach "
          f"the target) against {result.settings['pool_size']:,} candidates: {seconds:.1f} s, peak {peak:.0f} MB "
          "(targets: 30 s, 2048 MB)")
    # reference in the same run: 25 under-covered and 25 candidate items (whose tighter posteriors
    # try the shortlist), every draw against the whole pool in dense numpy
    A = Assessor(model, k=10, draws=64)
    sample = np.concatenate([np.flatnonzero(model.item_counts_ < 6)[:25], np.flatnonzero(model.item_counts_ >= 20)[:25]])
    t0 = time.perf_counter()
    ours = A.at(sample, 0.0)[0]
    ours_s = (time.perf_counter() - t0) / len(sample)
    t0 = time.perf_counter()
    ref = brute_force(A.vectors[sample], draw_factor(vector_part(model, A.cov_now[sample])), A.vectors[A.pool], A.eps,
                      exclude=A.pool_pos[sample])
    ref_s = (time.perf_counter() - t0) / len(sample)
    print(f"stability now, per item: {ours_s * 1e3:.2f} ms; dense numpy reference {ref_s * 1e3:.2f} ms; "
          f"ratio {ours_s / ref_s:.2f}; stability {ref.min():.3f} to {ref.max():.3f}, "
          f"largest difference {np.abs(ours - ref).max():.4f}")


if __name__ == "__main__":
    main()
