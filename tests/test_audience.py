"""The audience of a new item is the members with a taste for it, not the generous raters.

Invented data with planted tastes (internal test): a group of members who love one process,
another who love one region, and members whose bias (how high they rate everything) is large.
"""
import numpy as np
import pandas as pd
import pytest

from hybrid import HybridFactorModel
from hybrid.estimator.batch import score_items

PROCESSES = ["washed", "natural", "honey", "anaerobic"]
REGIONS = ["Ardenna", "Belcoro", "Cimarra", "Dovelle", "Estrin"]


def _lots(rng, n, prefix, processes=PROCESSES, regions=REGIONS):
    return pd.DataFrame({"process": rng.choice(processes, n), "region": rng.choice(regions, n),
                         "price": rng.uniform(8, 20, n).round(2)},
                        index=pd.Index([f"{prefix}{j:03d}" for j in range(n)], name="item"))


def _club(seed=5, n_members=600, n_lots=120, per_member=30):
    rng = np.random.default_rng(seed)
    processes, regions = PROCESSES, REGIONS
    lots = _lots(rng, n_lots, "T", processes, regions)
    members = np.array([f"M{u:04d}" for u in range(n_members)])
    bias = rng.normal(0, 0.6, n_members)                          # some members rate everything high
    # members 0-59 love honey, 60-119 love Cimarra, the rest have no taste
    like_process = np.zeros((n_members, len(processes)))
    like_region = np.zeros((n_members, len(regions)))
    like_process[:60, PROCESSES.index("honey")] = 1.5
    like_region[60:120, REGIONS.index("Cimarra")] = 1.5
    p = lots["process"].map(processes.index).to_numpy()
    g = lots["region"].map(regions.index).to_numpy()
    rows = []
    for u in range(n_members):
        seen = rng.choice(n_lots, per_member, replace=False)
        r = 3.0 + bias[u] + like_process[u, p[seen]] + like_region[u, g[seen]] + rng.normal(0, 0.4, per_member)
        rows.append(pd.DataFrame({"user": members[u], "item": lots.index[seen], "rating": r}))
    return pd.concat(rows, ignore_index=True), lots


SCHEMA = {"process": "category", "region": "category", "price": "number"}


@pytest.fixture(scope="module")
def planted():
    ratings, lots = _club()
    model = HybridFactorModel(rank=4, schema=SCHEMA, seed=1).fit(ratings, lots)
    return model


def _audience(model, new, **kw):
    rows = pd.concat(score_items(model, new, audience=10, neighbours=0, **kw))
    return [[u for u, _, _ in a] for a in rows["audience"]]


def test_the_audience_of_a_new_item_is_the_group_with_a_taste_for_it(planted):
    new = pd.DataFrame({"process": ["honey", "washed"], "region": ["Ardenna", "Cimarra"], "price": [14.0, 14.0]},
                       index=pd.Index(["N001", "N002"], name="item"))
    honey, cimarra = _audience(planted, new)
    # precision at 10 of the planted groups (members 0-59 and 60-119)
    assert np.mean([int(u[1:]) < 60 for u in honey]) >= 0.8, honey
    assert np.mean([60 <= int(u[1:]) < 120 for u in cimarra]) >= 0.8, cimarra


def test_by_rating_the_audience_is_the_generous_raters(planted):
    # the setting that ranks by expected rating lists members by their own bias for any lot
    new = _lots(np.random.default_rng(9), 20, "N")
    by_rating = _audience(planted, new, audience_by="rating")
    by_taste = _audience(planted, new)
    count = pd.Series([u for a in by_rating for u in a]).value_counts()
    assert count.iloc[0] >= 10                       # one member in at least half the lists
    assert pd.Series([u for a in by_taste for u in a]).value_counts().iloc[0] < count.iloc[0]


def test_on_the_demo_club_no_member_fills_the_lists(tmp_path):
    # the demo's own club and settings: its members' tastes are drawn at random, one each
    from pathlib import Path

    from hybrid.app.config import load_config
    from hybrid.app.workflows import train_model
    from hybrid.datasets.club import tasting_club, write_samples
    from hybrid.io.tables import read_attributes

    paths = write_samples(tmp_path, tasting_club(seed=7))
    cfg = load_config(Path(__file__).resolve().parents[1] / "configs" / "coffee.toml")
    model = train_model(paths["ratings"], paths["lots"], cfg)
    new = read_attributes(paths["new_lots"], cfg, model.features_.spec(), require_all=False)
    by_taste, by_rating = _audience(model, new), _audience(model, new, audience_by="rating")
    most = {name: pd.Series([u for a in lists for u in a]).value_counts().iloc[0]
            for name, lists in (("taste", by_taste), ("rating", by_rating))}
    assert most["taste"] <= len(by_taste) / 5, most
    assert most["rating"] > len(by_rating) / 2, most    # ranked by rating, one member is in most lists
