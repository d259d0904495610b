"""Benchmark of the user's path: the public estimator and ``hybrid train`` at their defaults.

On the synthetic catalogue of ``bench_train.py`` (1,000,000 ratings, 20,000 users x
5,000 items, planted rank 32, long-tailed popularity; a category and a number per
item) it times, in one process and one run:

- the default fit: ``HybridFactorModel(rank=32, schema=...).fit(ratings, items)``,
  every other setting at its default, with the time of each stage
  (``metrics_["stage_seconds"]``);
- the plain fit, the reference: the same data and the same number of epochs with the
  penalties the default fit chose held fixed, a fixed prior and no launch offset;
- ``hybrid train`` on the same data written to CSV, with only the columns and the rank
  in its config (the command's own defaults otherwise), as a child process.

It prints each time, the process's peak memory, and the ratios default / plain (target
<= 2.0) and train / plain.
The first run after installing compiles the row solver (cached afterwards), so a
small warm-up fit runs first.

Run:  python tests/bench/bench_fit.py [--ratings 1000000] [--rank 32] [--no-command]
"""
from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_train import synthetic  # noqa: E402

from hybrid import HybridFactorModel  # noqa: E402

SCHEMA = {"category": "category", "size": "number"}


def catalogue(n_ratings, rank):
    """Ratings and item attributes as a user would hand them over (ids as text)."""
    n_users, n_items = max(40, n_ratings // 50), max(20, n_ratings // 200)
    u, i, r, A = synthetic(n_users, n_items, n_ratings, rank=rank)
    ratings = pd.DataFrame({"user": np.char.add("u", u.astype(str)), "item": np.char.add("i", i.astype(str)),
                            "rating": np.round(r, 1)})
    items = pd.DataFrame({"category": np.asarray(A[:, 1:41].argmax(axis=1)).ravel().astype(str),
                          "size": A[:, 41].toarray().ravel()},
                         index=pd.Index(np.char.add("i", np.arange(n_items).astype(str)), name="item"))
    return ratings, items.loc[np.unique(ratings["item"])]


def timed_fit(ratings, items, **params):
    t0 = time.perf_counter()
    model = HybridFactorModel(schema=SCHEMA, **params).fit(ratings, items)
    return model, time.perf_counter() - t0


def train_command(ratings, items, rank):
    """Seconds of ``hybrid train`` from the CSV files to the saved model (a child process)."""
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        ratings.to_csv(tmp / "ratings.csv", index=False)
        items.to_csv(tmp / "items.csv")
        (tmp / "bench.toml").write_text(
            f'[attributes.columns]\ncategory = "category"\nsize = "number"\n\n[model]\nrank = {rank}\n')
        t0 = time.perf_counter()
        subprocess.run([sys.executable, "-m", "hybrid", "train", str(tmp / "ratings.csv"), str(tmp / "items.csv"),
                        "--config", str(tmp / "bench.toml"), "--out", str(tmp / "bench.hybrid"), "--quiet"],
                       check=True, capture_output=True, text=True)
        return time.perf_counter() - t0


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ratings", type=int, default=1_000_000)
    parser.add_argument("--rank", type=int, default=32)
    parser.add_argument("--no-command", action="store_true", help="skip the hybrid train run")
    args = parser.parse_args(argv)
    timed_fit(*catalogue(20_000, 4), rank=4, epochs=2)           # compile and load everything once
    ratings, items = catalogue(args.ratings, args.rank)
    default, t_default = timed_fit(ratings, items, rank=args.rank)
    chosen = {name: getattr(default, name + "_") for name in ("lam_user", "lam_item", "lam_map")}
    epochs = default.metrics_["epochs_run"]
    plain, t_plain = timed_fit(ratings, items, rank=args.rank, epochs=epochs, tol=0.0, prior="fixed",
                               launch_offset="none", **chosen)
    out = {"ratings": len(ratings), "rank": args.rank, "epochs": epochs, "penalties": chosen,
           "default_seconds": round(t_default, 2), "plain_seconds": round(t_plain, 2),
           "ratio_default_to_plain": round(t_default / t_plain, 2),
           "default_stages": {k: round(v, 2) for k, v in default.metrics_.get("stage_seconds", {}).items()}}
    out["peak_mb"] = round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)   # of both fits
    if not args.no_command:
        t_train = train_command(ratings, items, args.rank)
        out.update(train_seconds=round(t_train, 2), ratio_train_to_plain=round(t_train / t_plain, 2))
    print(json.dumps(out))
    print(f"{len(ratings):,} ratings, rank {args.rank}: default fit {t_default:.1f} s, plain fit "
          f"{t_plain:.1f} s ({epochs} epochs each), ratio {t_default / t_plain:.2f} (target <= 2.0)"
          + (f"; hybrid train {out['train_seconds']:.1f} s, ratio {out['ratio_train_to_plain']:.2f}"
             if "train_seconds" in out else ""))


if __name__ == "__main__":
    main()
