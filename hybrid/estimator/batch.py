"""Batch scoring of items no one has rated yet, in bounded memory.

Items are scored ``chunk`` at a time against every user: the item x user
block of one chunk is the only large temporary, so a file of 100,000 new
items streams through without ever holding the full matrix.
"""
from __future__ import annotations

import json
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from hybrid.common.errors import InputError, did_you_mean
from hybrid.common.limits import check_score, defaults
from hybrid.core.neighbours import nearest
from hybrid.estimator.explain import intervals, reasons
from hybrid.estimator.oddities import OddInputWarning, find_oddities
from hybrid.io.database import is_database, write_database_table
from hybrid.io.outputs import atomic_path, output_format

_S = defaults("score")   # the defaults, from the one table
# the columns of one number or word per item (besides the kept ones): what a file can be sorted by
SCALAR = ("item", "content_only", "attributes_changed", "bias", "expected_rating", "expected_low", "expected_high",
          "liked_share", "mean_user_rating", "baseline", "moved_by_ratings", "warnings")


def score_items(model, attributes: pd.DataFrame, *, liked: float = _S["liked"], audience: int = _S["audience"],
                neighbours: int = _S["neighbours"], chunk: int = _S["chunk"], clip_numbers: bool = _S["clip_numbers"],
                audience_by: str = _S["audience_by"], interval: float = _S["interval"], reasons: int = _S["reasons"],
                keep=None, client=None, window: int = 4):
    """Yield one DataFrame per chunk of items, one row per item.

    With a Dask ``client`` the chunks are scored on its workers (the model is
    sent to each once, ``window`` chunks in flight); the rows are the same.

    Columns: ``item``, the ``keep`` columns of ``attributes`` (by default its name-like ones,
    :func:`name_like`), ``content_only``
    (no ratings behind its vector: projected from its row of ``attributes``),
    ``attributes_changed`` (the model knows the item and the row differs from the attributes
    it holds; a rated item is still scored from its fitted vector), ``bias`` (projected),
    ``expected_rating`` (mean over all users of the scores limited to the training ratings'
    range) and ``expected_low``/``expected_high`` (its central ``interval`` interval,
    :func:`hybrid.estimator.explain.intervals`), ``liked_share`` (share of users expected at
    or above ``liked``), ``mean_user_rating``, ``baseline``, ``moved_by_ratings`` and
    ``reasons`` (every attribute effect, largest first: ``baseline`` plus the effects plus
    ``moved_by_ratings`` is ``mean_user_rating`` exactly, :func:`hybrid.estimator.explain.reasons`),
    ``audience`` (list of (user, expected rating, lift), best first: by lift, how much more the
    user is expected to like this item than the average rated item, with ``audience_by='taste'``;
    by expected rating with ``'rating'``), ``neighbours`` (list of (item, distance)) among the
    model's rated items, and ``warnings`` (what looks odd in the item's row, '' if nothing:
    :mod:`hybrid.estimator.oddities`; each kind is also warned once, an
    :class:`~hybrid.estimator.oddities.OddInputWarning`).  ``clip_numbers`` holds numbers to the
    training range before projecting; ``reasons`` is how many effects the flat formats list.

    Examples
    --------
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=3, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=3, schema=club.schema).fit(club.ratings, club.lots)
    >>> rows = pd.concat(score_items(m, club.new_lots, audience=2, neighbours=2))
    >>> rows["content_only"].tolist(), len(rows["audience"].iloc[0])
    ([True, True, True], 2)
    """
    check_score(chunk=chunk, audience=audience, neighbours=neighbours, liked=liked, clip_numbers=clip_numbers,
                audience_by=audience_by, interval=interval, reasons=reasons)
    keep = name_like(attributes.columns) if keep is None else list(keep)
    missing = [c for c in keep if c not in attributes.columns]
    if missing:
        raise InputError(f"column '{missing[0]}' to keep is not in the table of items to score"
                         f"{did_you_mean(missing[0], list(attributes.columns))}")
    from hybrid.engines.cluster import map_chunks
    known = pd.Index(model.item_ids_).get_indexer(attributes.index.astype(str))
    odd = find_oddities(model.features_, attributes)
    for line in odd.summary:   # once per run, whatever the chunks
        warnings.warn(line, OddInputWarning, stacklevel=2)
    notes = np.asarray(odd.per_item, dtype=object)
    parts = ((attributes.iloc[s:s + chunk], known[s:s + chunk], notes[s:s + chunk])
             for s in range(0, len(attributes), chunk))
    shared = _Shared(model, liked, audience, neighbours, clip_numbers, audience_by, interval, tuple(keep))
    yield from map_chunks(client, _score_chunk, shared, parts, window)


def name_like(columns) -> list[str]:
    """The columns that name an item (``name``, ``title``, ``lot_name``...): kept by default.

    >>> name_like(["item", "name", "region", "Title"])
    ['name', 'Title']
    """
    return [c for c in columns if any(w in str(c).lower() for w in ("name", "title"))]


@dataclass(frozen=True)
class _Shared:
    """What every chunk is scored with (sent to each Dask worker once)."""

    model: object
    liked: float
    audience: int
    neighbours: int
    clip_numbers: bool
    audience_by: str
    interval: float
    keep: tuple


def _audience(model, z, block, n_aud, by):
    """Positions and expected ratings of each item's audience, best first, and the users' lift:
    how much more each is expected to like the item than the average rated item."""
    F = model.check_fitted()
    zbar = model.item_blocks_[model.item_counts_ > 0].mean(axis=0)
    lift = next(model.score_blocks(z - zbar, chunk=len(z)))[1] - model.mu_
    if model.biases:   # the user's own bias is in both of the user's ratings: it cancels
        lift -= F.user[None, :, 0]
    key = lift if by == "taste" else block
    top = np.argpartition(-key, n_aud - 1, axis=1)[:, :n_aud] if n_aud else np.zeros((len(z), 0), int)
    order = np.argsort(-np.take_along_axis(key, top, 1), axis=1, kind="stable")
    top = np.take_along_axis(top, order, 1)
    return top, np.take_along_axis(block, top, 1), np.take_along_axis(lift, top, 1)


def _score_chunk(shared, part, known, notes):
    """The rows of one chunk of items (a pure function of the model and the chunk)."""
    model = shared.model
    off = 1 if model.biases else 0
    rated = np.flatnonzero(model.item_counts_ > 0)
    ids = part.index.to_numpy(dtype=str)
    z = model.blocks_for_items(ids, part, clip_numbers=shared.clip_numbers)
    counts = np.where(known >= 0, model.item_counts_[np.maximum(known, 0)], 0)
    changed = model.attributes_changed(part)
    block = model.clip(next(model.score_blocks(z, chunk=len(z)))[1])
    top, top_scores, top_lift = _audience(model, z, block, min(shared.audience, len(model.user_ids_)),
                                          shared.audience_by)
    self_pos = pd.Index(model.item_ids_[rated]).get_indexer(ids)
    nidx, ndist = nearest(z[:, off:], model.item_blocks_[rated, off:], shared.neighbours, exclude=self_pos) \
        if shared.neighbours else (np.zeros((len(z), 0), int), np.zeros((len(z), 0)))
    why = reasons(model, ids, part, clip_numbers=shared.clip_numbers)
    iv = intervals(model, ids, part, level=shared.interval, blocks=z)
    expected = block.mean(axis=1)
    # the interval is the mean user's; it is carried to the expected rating by its offset
    shift = expected - iv["centre"].to_numpy()
    users, items = model.user_ids_, model.item_ids_[rated]
    kept = {c: part[c].astype(str).to_numpy() for c in shared.keep}
    return pd.DataFrame({
        "item": ids, **kept, "content_only": counts == 0,
        # a rated item is scored from its fitted vector whatever its row says; this marks where
        # the row differs from what the model was fitted with (an unrated one follows the row)
        "attributes_changed": changed,
        "bias": z[:, 0] if model.biases else 0.0,
        "expected_rating": expected,
        "expected_low": np.clip(iv["low"].to_numpy() + shift, *model.rating_range_),
        "expected_high": np.clip(iv["high"].to_numpy() + shift, *model.rating_range_),
        "liked_share": (block >= shared.liked).mean(axis=1),
        "mean_user_rating": why.rating, "baseline": why.baseline, "moved_by_ratings": why.moved,
        "reasons": [[(name, round(e, 6)) for name, e in why.top(j)] for j in range(len(ids))],
        "audience": [list(zip(users[t].tolist(), np.round(v, 4).tolist(), np.round(f, 4).tolist()))
                     for t, v, f in zip(top, top_scores, top_lift)],
        "neighbours": [list(zip(items[t].tolist(), np.round(v, 6).tolist())) for t, v in zip(nidx, ndist)],
        "warnings": list(notes),
    })


def flat_columns(df: pd.DataFrame, n_reasons: int = _S["reasons"]) -> pd.DataFrame:
    """Wide columns: user_1, user_1_rating, user_1_lift, ..., neighbour_1, neighbour_1_distance, ...,
    reason_1, reason_1_effect, ... (the first ``n_reasons`` reasons)."""
    columns = {}
    for name, col, values in (("user", "audience", ("rating", "lift")), ("neighbour", "neighbours", ("distance",)),
                              ("reason", "reasons", ("effect",))):
        # every chunk the same columns (a database table or a Parquet file takes one shape):
        # the reasons' width is the setting, the others' the lists' own (the same in every row)
        width = n_reasons if col == "reasons" else max((len(v) for v in df[col]), default=0)
        for j in range(width):
            columns[f"{name}_{j + 1}"] = [v[j][0] if j < len(v) else "" for v in df[col]]
            for m, value in enumerate(values, start=1):
                columns[f"{name}_{j + 1}_{value}"] = [v[j][m] if j < len(v) else np.nan for v in df[col]]
    # joined at once: a column at a time re-copies the frame (thousands of columns for a long audience)
    return pd.concat([df.drop(columns=["audience", "neighbours", "reasons"]).reset_index(drop=True),
                      pd.DataFrame(columns, index=range(len(df)))], axis=1)


def _records(df: pd.DataFrame):
    for rec in df.to_dict(orient="records"):
        rec["audience"] = [{"user": u, "expected_rating": r, "lift": f} for u, r, f in rec["audience"]]
        rec["neighbours"] = [{"item": i, "distance": d} for i, d in rec["neighbours"]]
        rec["reasons"] = [{"feature": f, "effect": e} for f, e in rec["reasons"]]
        rec["content_only"] = bool(rec["content_only"])
        rec["attributes_changed"] = bool(rec["attributes_changed"])
        yield json.dumps(rec)


def _parquet_chunk(fh, writer, flat: pd.DataFrame):
    """Append one chunk to a Parquet stream whose columns the first chunk fixed."""
    if writer is None:
        return _append(pq.ParquetWriter(fh, pa.Table.from_pandas(flat, preserve_index=False).schema), flat)
    extra = set(flat.columns) - set(writer.schema.names)
    if extra:  # a later chunk wider than the first: the audience/neighbour widths are settings
        raise ValueError(f"scores chunk has columns the first chunk lacked: {sorted(extra)}")
    return _append(writer, flat.reindex(columns=writer.schema.names))


def _append(writer, flat):
    writer.write_table(pa.Table.from_pandas(flat, preserve_index=False).cast(writer.schema))
    return writer


def write_scores(chunks, path: str | Path, reasons: int = _S["reasons"]) -> int:
    """Stream scored chunks by the file's ending (CSV, JSON, JSON Lines, Parquet), or to a database
    table (``URL#table``, the CSV's columns; :mod:`hybrid.io.database`); return rows.

    CSV and Parquet get the wide columns of :func:`flat_columns`; JSON and JSON Lines keep the audience
    and the neighbours as lists.  One chunk is held at a time whatever the format.
    """
    if is_database(path):
        return write_database_table((flat_columns(df, reasons) for df in chunks), str(path))
    fmt = output_format(path)
    n, writer = 0, None
    binary = fmt == "parquet"
    with atomic_path(path) as tmp, open(tmp, "wb" if binary else "w",
                                        **({} if binary else {"encoding": "utf-8", "newline": ""})) as fh:
        if fmt == "json":
            fh.write("[")
        for df in chunks:
            if fmt in ("json", "jsonl"):
                for line in _records(df):
                    fh.write(line + "\n" if fmt == "jsonl" else ("," if n else "") + "\n" + line)
                    n += 1
                continue
            flat = flat_columns(df, reasons)
            if fmt == "parquet":
                writer = _parquet_chunk(fh, writer, flat)
            else:
                flat.to_csv(fh, index=False, header=(n == 0), float_format="%.6g")
            n += len(df)
        if fmt == "json":
            fh.write("\n]\n")
        if writer is not None:
            writer.close()
    return n
