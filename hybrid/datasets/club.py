"""The demo scenario: a speciality coffee roaster's tasting club.

Members rate lots from 1 to 5 in half steps.  Lots carry tasting notes (from
a vocabulary of flavour words), an origin region, a process, a roast level,
an altitude, a price and a few certification tags; new lots arrive monthly
with no ratings.  Every name here is invented.  Ratings come from a hidden
factor model in which the attributes explain part of each lot's vector, and
rating counts have a long tail (a few lots with hundreds, many with under
five), so the planner has real work to do.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

FAMILIES = {
    "citrus": ["bergamot", "lime", "grapefruit", "mandarin", "lemongrass", "yuzu"],
    "berry": ["blackcurrant", "raspberry", "blueberry", "cranberry", "mulberry", "redcurrant"],
    "stonefruit": ["apricot", "peach", "plum", "nectarine", "cherry", "greengage"],
    "floral": ["jasmine", "rosehip", "lavender", "elderflower", "hibiscus", "orangeblossom"],
    "cocoa": ["cocoa", "fudge", "molasses", "praline", "brownie", "toffee"],
    "nutty": ["hazelnut", "almond", "pecan", "marzipan", "walnut", "sesame"],
    "spice": ["cardamom", "clove", "cinnamon", "pepper", "nutmeg", "ginger"],
    "earthy": ["cedar", "tobacco", "leather", "oakmoss", "malt", "rye"],
}
REGIONS = ["Valle Ondoro", "Serra Nubla", "Kiremba Heights", "Lago Verdeza", "Montes Caliva",
           "Bukanda Ridge", "Tierra Solana", "Ngorwe Plateau", "Cerro Amaleo", "Halvani Slopes",
           "Rio Pequel", "Matembe Hills"]
PROCESSES = ["washed", "natural", "honey", "anaerobic"]
ROASTS = ["light", "medium-light", "medium", "dark"]
TAGS = ["organic", "direct-trade", "womens-cooperative", "shade-grown", "microlot"]
NAME_WORDS = ["Aurora", "Brasa", "Cumbre", "Dulce", "Estrella", "Fuego", "Garza", "Hoja", "Isla",
              "Jade", "Kora", "Luna", "Miel", "Nido", "Onda", "Pico", "Quetza", "Roca", "Sol",
              "Tinta", "Umbra", "Vela", "Yaku", "Zafra"]

SCHEMA = {"notes": "text", "region": "category", "process": "category", "roast": "category",
          "altitude_m": "number", "price": "number", "certifications": "tags",
          "name": "ignore", "arrival": "ignore", "margin": "ignore"}


@dataclass
class TastingClub:
    """Generated tables and the hidden truth behind them."""

    ratings: pd.DataFrame      # columns user, item, rating (member, lot, score)
    lots: pd.DataFrame         # indexed by lot id
    new_lots: pd.DataFrame     # indexed by lot id, never rated
    true_vectors: pd.DataFrame  # hidden [bias, x] of every lot, rated and new
    true_attribute_part: pd.DataFrame  # the part of each vector the attributes explain
    schema: dict


def _lot_table(rng, ids, months, embed):
    n = len(ids)
    fam_names = list(FAMILIES)
    mix = rng.dirichlet(np.full(len(fam_names), 0.35), n)
    region = rng.integers(0, len(REGIONS), n)
    process = rng.choice(len(PROCESSES), n, p=[0.45, 0.3, 0.15, 0.1])
    roast = rng.choice(len(ROASTS), n, p=[0.25, 0.35, 0.25, 0.15])
    altitude = np.round(rng.normal(1650, 280, n).clip(900, 2400), -1)
    notes = []
    for j in range(n):  # one short sentence of notes per lot: text, not numbers
        fams = rng.choice(len(fam_names), size=rng.integers(2, 5), p=mix[j])
        words = [FAMILIES[fam_names[f]][rng.integers(0, 6)] for f in fams]
        notes.append(" ".join(dict.fromkeys(words)))
    tags = ["|".join(t for t in TAGS if rng.random() < 0.22) for _ in range(n)]
    # the attribute part of each lot's hidden vector: flavour families, region, process, roast
    part = (mix @ embed["family"] + embed["region"][region] + embed["process"][process]
            + embed["roast"][roast])
    quality = 0.25 * (altitude - 1650) / 280 + 0.15 * (process == 3) + rng.normal(0, 0.25, n)
    price = np.round(9 + 3.2 * quality + 0.004 * (altitude - 900) + rng.gamma(2.0, 1.8, n), 2)
    margin = np.round(rng.uniform(0.15, 0.45, n), 3)
    names = [f"{REGIONS[r].split()[0]} {NAME_WORDS[rng.integers(0, len(NAME_WORDS))]}" for r in region]
    table = pd.DataFrame({
        "name": names, "notes": notes, "region": [REGIONS[r] for r in region],
        "process": [PROCESSES[p] for p in process], "roast": [ROASTS[r] for r in roast],
        "altitude_m": altitude, "price": price, "certifications": tags, "arrival": months,
        "margin": margin}, index=pd.Index(ids, name="lot"))
    return table, part, quality


def tasting_club(n_members: int = 3000, n_lots: int = 600, n_new: int = 40, rank: int = 5,
                 mean_ratings_per_member: float = 12.0, rating_noise: float = 0.55,
                 seed: int = 7) -> TastingClub:
    """Generate the tasting club; same arguments and seed give identical tables.

    Examples
    --------
    >>> club = tasting_club(n_members=200, n_lots=50, n_new=4, seed=1)
    >>> bool(club.ratings["rating"].between(1, 5).all()), len(club.new_lots)
    (True, 4)
    """
    rng = np.random.default_rng(seed)
    embed = {"family": rng.normal(0, 0.8, (len(FAMILIES), rank)),
             "region": rng.normal(0, 0.35, (len(REGIONS), rank)),
             "process": rng.normal(0, 0.3, (len(PROCESSES), rank)),
             "roast": rng.normal(0, 0.3, (len(ROASTS), rank))}
    ids = np.array([f"L{j:04d}" for j in range(1, n_lots + n_new + 1)])
    months = np.array([f"2026-{1 + j * 10 // max(n_lots, 1):02d}" for j in range(n_lots)] + ["2027-01"] * n_new)
    lots, part, quality = _lot_table(rng, ids, months, embed)
    own = rng.normal(0, 0.45, part.shape)  # what no attribute explains
    x = part + own
    b_item = 0.8 * quality + rng.normal(0, 0.15, len(ids))
    members = np.array([f"M{u:05d}" for u in range(1, n_members + 1)])
    theta = rng.normal(0, 0.55, (n_members, rank))
    b_user = rng.normal(0, 0.35, n_members)
    # long tails: member activity and lot popularity are log-normal
    activity = rng.lognormal(0, 1.0, n_members)
    popularity = rng.lognormal(0, 1.25, n_lots)
    n_draw = int(mean_ratings_per_member * n_members * 1.1)
    u = rng.choice(n_members, n_draw, p=activity / activity.sum())
    i = rng.choice(n_lots, n_draw, p=popularity / popularity.sum())
    key = np.unique(u.astype(np.int64) * n_lots + i)
    u, i = key // n_lots, key % n_lots
    raw = 3.55 + b_user[u] + b_item[i] + np.einsum("nk,nk->n", theta[u], x[i]) + rng.normal(0, rating_noise, len(u))
    score = np.clip(np.round(raw * 2) / 2, 1.0, 5.0)
    order = rng.permutation(len(u))
    ratings = pd.DataFrame({"user": members[u[order]], "item": ids[i[order]], "rating": score[order]})
    blocks = np.column_stack([b_item, x])
    cols = ["bias"] + [f"f{j}" for j in range(rank)]
    return TastingClub(ratings=ratings, lots=lots.iloc[:n_lots], new_lots=lots.iloc[n_lots:],
                       true_vectors=pd.DataFrame(blocks, index=lots.index, columns=cols),
                       true_attribute_part=pd.DataFrame(part, index=lots.index, columns=cols[1:]),
                       schema=dict(SCHEMA))


def write_samples(folder: str | Path, club: TastingClub | None = None) -> dict[str, Path]:
    """Write ``ratings.csv``, ``lots.csv`` and ``new_lots.csv`` in the club's own column names."""
    from hybrid.io.outputs import atomic_path

    club = club or tasting_club()
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    tables = {"ratings": club.ratings.rename(columns={"user": "member", "item": "lot", "rating": "rating"}),
              "lots": club.lots.reset_index(), "new_lots": club.new_lots.reset_index()}
    paths = {}
    for name, table in tables.items():
        paths[name] = folder / f"{name}.csv"
        with atomic_path(paths[name]) as tmp:
            table.to_csv(tmp, index=False)
    return paths


def write_sample_database(path: str | Path, paths: dict[str, Path]) -> str:
    """The same tables in an SQLite database (typed columns, as a shop's database would hold
    them), replacing the file; returns its SQLAlchemy URL (add ``#ratings`` for a table)."""
    import sqlalchemy

    from hybrid.io.outputs import atomic_path

    with atomic_path(path) as tmp:
        engine = sqlalchemy.create_engine(f"sqlite:///{tmp}")
        for name in ("ratings", "lots", "new_lots"):
            table = pd.read_csv(paths[name], dtype={"member": str, "lot": str})
            table.to_sql(name, engine, index=False, if_exists="replace")
        engine.dispose()
    return f"sqlite:///{path}"


DEMO_CONFIG = Path(__file__).with_name("coffee.toml")  # the demo's settings, as configs/coffee.toml
