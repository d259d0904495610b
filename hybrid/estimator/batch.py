"""Batch scoring of items no one has rated yet, in bounded memory.

Items are scored ``chunk`` at a time against every user: the item x user
block of one chunk is the only large temporary, so a file of 100,000 new
items streams through without ever holding the full matrix.
"""
from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from hybrid.common.limits import check_score, defaults
from hybrid.core.neighbours import nearest
from hybrid.estimator.oddities import OddInputWarning, find_oddities
from hybrid.io.outputs import atomic_path, output_format

_S = defaults("score")   # the defaults, from the one table


def score_items(model, attributes: pd.DataFrame, *, liked: float = _S["liked"], audience: int = _S["audience"],
                neighbours: int = _S["neighbours"], chunk: int = _S["chunk"], clip_numbers: bool = _S["clip_numbers"],
                client=None, window: int = 4):
    """Yield one DataFrame per chunk of items, one row per item.

    With a Dask ``client`` the chunks are scored on its workers (the model is
    sent to each once, ``window`` chunks in flight); the rows are the same.

    Columns: ``item``, ``content_only`` (no ratings behind its vector: projected from its row
    of ``attributes``), ``attributes_changed`` (the model knows the item and the row differs
    from the attributes it holds; a rated item is still scored from its fitted vector),
    ``bias`` (projected), ``expected_rating`` (mean over all users of the
    scores limited to the training ratings' range),
    ``liked_share`` (share of users expected at or above ``liked``),
    ``audience`` (list of (user, expected rating), best first) and
    ``nearest`` (list of (item, distance)) among the model's rated items, and ``warnings``
    (what looks odd in the item's row, '' if nothing: :mod:`hybrid.estimator.oddities`; each
    kind is also warned once, an :class:`~hybrid.estimator.oddities.OddInputWarning`).
    ``clip_numbers`` holds numbers to the training range before projecting.

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
    check_score(chunk=chunk, audience=audience, neighbours=neighbours, liked=liked, clip_numbers=clip_numbers)
    from hybrid.engines.cluster import map_chunks
    known = pd.Index(model.item_ids_).get_indexer(attributes.index.astype(str))
    odd = find_oddities(model.features_, attributes)
    for line in odd.summary:   # once per run, whatever the chunks
        warnings.warn(line, OddInputWarning, stacklevel=2)
    notes = np.asarray(odd.per_item, dtype=object)
    parts = ((attributes.iloc[s:s + chunk], known[s:s + chunk], notes[s:s + chunk])
             for s in range(0, len(attributes), chunk))
    yield from map_chunks(client, _score_chunk, (model, liked, audience, neighbours, clip_numbers), parts, window)


def _score_chunk(shared, part, known, notes):
    """The rows of one chunk of items (a pure function of the model and the chunk)."""
    model, liked, audience, neighbours, clip_numbers = shared
    off = 1 if model.biases else 0
    rated = np.flatnonzero(model.item_counts_ > 0)
    n_aud = min(audience, len(model.user_ids_))
    ids = part.index.to_numpy(dtype=str)
    z = model.blocks_for_items(ids, part, clip_numbers=clip_numbers)
    counts = np.where(known >= 0, model.item_counts_[np.maximum(known, 0)], 0)
    changed = model.attributes_changed(part)
    block = model.clip(next(model.score_blocks(z, chunk=len(z)))[1])
    top = np.argpartition(-block, n_aud - 1, axis=1)[:, :n_aud] if n_aud else np.zeros((len(z), 0), int)
    top_scores = np.take_along_axis(block, top, 1)
    order = np.argsort(-top_scores, axis=1, kind="stable")
    top, top_scores = np.take_along_axis(top, order, 1), np.take_along_axis(top_scores, order, 1)
    self_pos = pd.Index(model.item_ids_[rated]).get_indexer(ids)
    nidx, ndist = nearest(z[:, off:], model.item_blocks_[rated, off:], neighbours, exclude=self_pos) \
        if neighbours else (np.zeros((len(z), 0), int), np.zeros((len(z), 0)))
    users, items = model.user_ids_, model.item_ids_[rated]
    return pd.DataFrame({
        "item": ids, "content_only": counts == 0,
        # a rated item is scored from its fitted vector whatever its row says; this marks where
        # the row differs from what the model was fitted with (an unrated one follows the row)
        "attributes_changed": changed,
        "bias": z[:, 0] if model.biases else 0.0,
        "expected_rating": block.mean(axis=1), "liked_share": (block >= liked).mean(axis=1),
        "audience": [list(zip(users[t].tolist(), np.round(v, 4).tolist())) for t, v in zip(top, top_scores)],
        "nearest": [list(zip(items[t].tolist(), np.round(v, 6).tolist())) for t, v in zip(nidx, ndist)],
        "warnings": list(notes),
    })


def _flat(df: pd.DataFrame) -> pd.DataFrame:
    """Wide CSV columns: user_1, user_1_rating, ..., neighbour_1, neighbour_1_distance, ..."""
    columns = {}
    for name, col, value in (("user", "audience", "rating"), ("neighbour", "nearest", "distance")):
        width = max((len(v) for v in df[col]), default=0)
        for j in range(width):
            columns[f"{name}_{j + 1}"] = [v[j][0] if j < len(v) else "" for v in df[col]]
            columns[f"{name}_{j + 1}_{value}"] = [v[j][1] if j < len(v) else np.nan for v in df[col]]
    # joined at once: a column at a time re-copies the frame (thousands of columns for a long audience)
    return pd.concat([df.drop(columns=["audience", "nearest"]).reset_index(drop=True),
                      pd.DataFrame(columns, index=range(len(df)))], axis=1)


def _records(df: pd.DataFrame):
    for rec in df.to_dict(orient="records"):
        rec["audience"] = [{"user": u, "expected_rating": r} for u, r in rec["audience"]]
        rec["nearest"] = [{"item": i, "distance": d} for i, d in rec["nearest"]]
        rec["content_only"] = bool(rec["content_only"])
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


def write_scores(chunks, path: str | Path) -> int:
    """Stream scored chunks by the file's ending (CSV, JSON, JSON Lines, Parquet); return rows.

    CSV and Parquet get the wide columns of ``_flat``; JSON and JSON Lines keep the audience
    and the nearest items as lists.  One chunk is held at a time whatever the format.
    """
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
            flat = _flat(df)
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
