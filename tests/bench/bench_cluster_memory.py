"""Benchmark: the default fit's peak memory, one process against each worker of a cluster.

The user's path: ``HybridFactorModel(rank=32, schema=...).fit(ratings, items)`` with every
other setting at its default (penalty search, learned prior, launch offset), on the synthetic
catalogue of ``bench_fit.py``, once in one process (the local engine) and once with
``engine=Engine("dask", address=...)`` on a ``distributed.LocalCluster`` of W separate worker
processes (one thread each).  Each run is a child process of its own.

It prints, in MB, each process's peak (VmHWM) and what it held before the fit (the catalogue
generated and, on the cluster, every worker warmed up by a small fit: imports and compiled
kernels), and the ratio of each worker's peak to the single process's, with the bound
``1/W + overhead / single`` where the overhead is a worker's warmed-up size (measured in the
same run).  Figures go in the README (Running on a cluster).

Run:  python tests/bench/bench_cluster_memory.py [--ratings 10000000] [--workers 2] [--partitions 8]
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))


def reset_peak():
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")


def mb(field="VmHWM"):
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) for line in fh if line.startswith(field + ":")) / 1024


def child(engine, n_ratings, workers, partitions):
    import warnings

    from bench_fit import SCHEMA, catalogue

    from hybrid import HybridFactorModel
    from hybrid.engines.engine import Engine
    warnings.simplefilter("ignore")
    small = catalogue(20_000, 4)
    ratings, items = catalogue(n_ratings, 32)
    if engine == "local":
        HybridFactorModel(schema=SCHEMA, rank=4, epochs=2).fit(*small)   # the same warm-up as the workers'
        before = mb("VmRSS")
        reset_peak()
        t0 = time.perf_counter()
        model = HybridFactorModel(schema=SCHEMA, rank=32).fit(ratings, items)
        return {"seconds": time.perf_counter() - t0, "before_mb": before, "peak_mb": mb(),
                "objective": model.metrics_["objective"]}
    import distributed
    with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0",
                                  host="127.0.0.1") as cluster, distributed.Client(cluster) as client:
        where = Engine("dask", address=cluster.scheduler_address, partitions=partitions)
        HybridFactorModel(schema=SCHEMA, rank=4, epochs=2).fit(*small, engine=where)   # imports, kernels
        warmed = client.run(lambda: mb("VmRSS"))
        client.run(reset_peak)
        before = mb("VmRSS")
        reset_peak()
        t0 = time.perf_counter()
        model = HybridFactorModel(schema=SCHEMA, rank=32).fit(ratings, items, engine=where)
        seconds = time.perf_counter() - t0
        peaks = client.run(mb)
    return {"seconds": seconds, "before_mb": before, "peak_mb": mb(), "objective": model.metrics_["objective"],
            "workers_warmed_mb": list(warmed.values()), "workers_peak_mb": list(peaks.values())}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ratings", type=int, default=10_000_000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--partitions", type=int, default=8)
    ap.add_argument("--child", choices=["local", "dask"])
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(args.child, args.ratings, args.workers, args.partitions)))
        return
    res = {}
    for engine in ("local", "dask"):
        proc = subprocess.run([sys.executable, __file__, "--child", engine, "--ratings", str(args.ratings),
                               "--workers", str(args.workers), "--partitions", str(args.partitions)],
                              capture_output=True, text=True, check=True)
        res[engine] = json.loads(proc.stdout.strip().splitlines()[-1])
        print(engine, json.dumps(res[engine]))
    single, dsk = res["local"]["peak_mb"], res["dask"]
    overhead = max(dsk["workers_warmed_mb"])
    worst = max(dsk["workers_peak_mb"])
    print(f"{args.ratings:,} ratings, default fit: one process {single:,.0f} MB ({res['local']['seconds']:.0f} s); "
          f"{args.workers} workers " + ", ".join(f"{p:,.0f}" for p in dsk["workers_peak_mb"])
          + f" MB (warmed up {overhead:,.0f} MB), client {dsk['peak_mb']:,.0f} MB ({dsk['seconds']:.0f} s)")
    print(f"worst worker / single process {worst / single:.2f} (target <= 0.65 for two workers; "
          f"1/W + overhead/single = {1 / args.workers + overhead / single:.2f}); objectives agree to "
          f"{abs(dsk['objective'] - res['local']['objective']) / res['local']['objective']:.1e}")


if __name__ == "__main__":
    main()
