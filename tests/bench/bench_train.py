"""Benchmark: seconds per epoch and peak memory of the trainer, against a reference in the same run.

Generates 1,000,000 ratings (20,000 users x 5,000 items, rank 32) and prints:
seconds per epoch (the median of four), peak memory, and the ratio of one
epoch to ``sklearn.decomposition.TruncatedSVD(32, n_iter=5)`` on the same
sparse matrix (the median of three runs).  The first run of the package
compiles its row solver (cached afterwards): run the script twice after
installing.
With ``--large`` it also runs 10,000,000 ratings (200,000 users x 50,000 items)
and prints the ratio of its epoch to the 1,000,000-rating one.

Run:  python tests/bench/bench_train.py [--large]
Peak memory is measured in a fresh child process per size (resource.getrusage).
"""
from __future__ import annotations

import json
import resource
import subprocess
import sys
import time

import numpy as np
import scipy.sparse as sp


def synthetic(n_users, n_items, n_ratings, rank=32, seed=0):
    rng = np.random.default_rng(seed)
    u = rng.integers(0, n_users, int(n_ratings * 1.02))
    i = (rng.pareto(1.2, len(u)) * n_items / 20).astype(np.int64) % n_items
    key = np.unique(u.astype(np.int64) * n_items + i)[:n_ratings]
    u, i = key // n_items, key % n_items
    X = rng.normal(0, 0.4, (n_items, rank))
    T = rng.normal(0, 0.4, (n_users, rank))
    r = np.clip(3.5 + np.einsum("nk,nk->n", T[u], X[i]) + rng.normal(0, 0.8, len(u)), 1, 5)
    # attributes: 40 categories and a number per item
    cats = rng.integers(0, 40, n_items)
    A = sp.hstack([sp.csr_matrix(np.ones((n_items, 1))),
                   sp.csr_matrix((np.ones(n_items), (np.arange(n_items), cats)), shape=(n_items, 40)),
                   sp.csr_matrix(rng.normal(size=(n_items, 1)))], format="csr")
    return u, i, r, A


def one_size(n_users, n_items, n_ratings, epochs=4):
    from sklearn.decomposition import TruncatedSVD

    from hybrid.common.limits import SETTINGS, threads
    from hybrid.core.steps import Problem, RatingData
    from hybrid.core.train import fit_factors

    u, i, r, A = synthetic(n_users, n_items, n_ratings)
    data = RatingData.from_codes(u, i, r, n_users, n_items)
    t0 = time.perf_counter()
    F, _, _ = fit_factors(Problem.of(data, A, lam_user=5.0, lam_map=1.0), rank=32, lam_item=5.0, epochs=epochs,
                          tol=0.0, seed=0, prior="fixed",
                          n_jobs=threads(SETTINGS["model"]["n_jobs"].default))   # the default: every core
    per_epoch = float(np.median([h["seconds"] for h in F.history]))
    first_epoch = F.history[0]["seconds"]
    out = {"ratings": int(data.nnz), "users": n_users, "items": n_items, "epoch_seconds": per_epoch,
           "first_epoch_seconds": first_epoch,
           "fit_seconds": time.perf_counter() - t0}
    if n_ratings <= 2_000_000:
        times = []
        for _ in range(3):  # the median of three runs, as the epoch's is the median of four
            t0 = time.perf_counter()
            TruncatedSVD(32, n_iter=5, random_state=0).fit(data.by_user)
            times.append(time.perf_counter() - t0)
        out["svd_seconds"] = float(np.median(times))
        out["ratio_epoch_to_svd"] = per_epoch / out["svd_seconds"]
    out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def main():
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        print(json.dumps(one_size(*map(int, sys.argv[2:5]))))
        return
    sizes = [(20_000, 5_000, 1_000_000)]
    if "--large" in sys.argv:
        sizes.append((200_000, 50_000, 10_000_000))
    results = []
    for size in sizes:
        proc = subprocess.run([sys.executable, __file__, "--child", *map(str, size)], capture_output=True,
                              text=True, check=True)
        results.append(json.loads(proc.stdout.strip().splitlines()[-1]))
        print(json.dumps(results[-1]))
    small = results[0]
    print(f"1M ratings: {small['epoch_seconds']:.2f} s per epoch, TruncatedSVD(32, n_iter=5) "
          f"{small['svd_seconds']:.2f} s, ratio {small['ratio_epoch_to_svd']:.2f} (target <= 1.0), "
          f"peak {small['peak_mb']:.0f} MB (target < 1500)")
    if len(results) > 1:
        big = results[1]
        print(f"10M ratings: {big['epoch_seconds']:.2f} s per epoch, ratio to 1M "
              f"{big['epoch_seconds'] / small['epoch_seconds']:.1f} (target <= 12), peak {big['peak_mb']:.0f} MB")


if __name__ == "__main__":
    main()
