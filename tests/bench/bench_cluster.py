"""Benchmark: the trainer here versus on a two-worker local Dask cluster, same run.

Generates 10,000,000 ratings (200,000 users x 50,000 items, rank 32; the
generator of ``bench_train.py``) and prints seconds per epoch for the local
engine (two threads) and for a ``distributed.LocalCluster`` of two worker
processes (one thread each, 8 partitions per side), their ratio, and the
peak memory of every process (the local process; the cluster's client and
each worker).  Peaks are each process's own high-water mark (VmHWM), reset
after start-up.

Run:  python tests/bench/bench_cluster.py [--ratings 10000000] [--epochs 4]
(the first epoch, which also loads the blocks on the workers, is left out of the median)
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))


def reset_peak():
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")


def peak_mb():
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) for line in fh if line.startswith("VmHWM:")) / 1024


def sizes(n_ratings):
    scale = n_ratings / 10_000_000
    return max(int(200_000 * scale), 1000), max(int(50_000 * scale), 500)


def child(engine, n_ratings, epochs):
    from bench_train import synthetic

    from hybrid.core.steps import Problem, RatingData
    from hybrid.core.train import fit_factors

    n_users, n_items = sizes(n_ratings)
    u, i, r, A = synthetic(n_users, n_items, n_ratings)
    reset_peak()
    fit = dict(rank=32, lam_item=5.0, epochs=epochs, tol=0.0, seed=0, prior="fixed")
    if engine == "local":
        data = RatingData.from_codes(u, i, r, n_users, n_items)
        F, _, _ = fit_factors(Problem.of(data, A, lam_user=5.0, lam_map=1.0), n_jobs=2, **fit)
        out = {"peak_mb": {"local": peak_mb()}}
    else:
        import distributed

        from hybrid.engines.cluster import ClusterRatingData
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                                      host="127.0.0.1") as cluster, distributed.Client(cluster) as client:
            client.run(reset_peak)
            data = ClusterRatingData.from_codes(client, u, i, r, n_users, n_items, partitions=8, A=A)
            F, _, _ = fit_factors(Problem.of(data, A, lam_user=5.0, lam_map=1.0), **fit)
            workers = client.run(peak_mb)
            data.close()
        out = {"peak_mb": {"client": peak_mb(), **{f"worker {j}": v for j, v in enumerate(workers.values())}}}
    out["epoch_seconds"] = float(np.median([h["seconds"] for h in F.history[1:]]))
    out["objective"] = F.history[-1]["objective"]
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--ratings", type=int, default=10_000_000)
    ap.add_argument("--epochs", type=int, default=4)
    ap.add_argument("--child", choices=["local", "dask"])
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(args.child, args.ratings, args.epochs)))
        return
    res = {}
    for engine in ("local", "dask"):
        proc = subprocess.run([sys.executable, __file__, "--child", engine, "--ratings", str(args.ratings),
                               "--epochs", str(args.epochs)], capture_output=True, text=True, check=True)
        res[engine] = json.loads(proc.stdout.strip().splitlines()[-1])
        print(engine, json.dumps(res[engine]))
    loc, dsk = res["local"], res["dask"]
    print(f"{args.ratings:,} ratings: local {loc['epoch_seconds']:.2f} s per epoch, 2-worker cluster "
          f"{dsk['epoch_seconds']:.2f} s, ratio cluster/local {dsk['epoch_seconds'] / loc['epoch_seconds']:.2f}; "
          f"objectives agree to {abs(loc['objective'] - dsk['objective']) / loc['objective']:.1e}")
    print("peak memory (MB): " + ", ".join(f"{k} {v:.0f}" for r in (loc, dsk) for k, v in r["peak_mb"].items()))


if __name__ == "__main__":
    main()
