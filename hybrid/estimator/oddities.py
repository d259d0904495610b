"""What looks odd in a table of items to score, against what the model was fitted on.

Four kinds, each reported once per run with its count (and a few examples) and per item in
the scores' ``warnings`` column: attribute columns the model uses that the table lacks,
category and tag values never seen in training (with the nearest known value where a near
spelling exists), numbers outside the training range (by how much; they are clipped to it
for the projection unless the ``clip_numbers`` setting is off: a linear projection far outside
its data says nothing), and text with no word the model knows.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from hybrid.estimator.features import AttributeEncoder, number_values, split_tags


class OddInputWarning(UserWarning):
    """Something in a table of items to score looks unlike what the model was fitted on."""


@dataclass
class Oddities:
    """The findings on one table: ``per_item`` (one text per row, '' when nothing is odd) and
    ``summary`` (one line per kind and column, for the screen)."""

    per_item: list = field(default_factory=list)
    summary: list = field(default_factory=list)


def _near(value: str, known: list[str]) -> str:
    lower = {k.lower(): k for k in known}
    if value.lower() in lower:
        return lower[value.lower()]
    close = difflib.get_close_matches(value, known, n=1, cutoff=0.75)
    return close[0] if close else ""


def _examples(values) -> str:
    shown = []
    for v, near in values[:3]:
        shown.append(f"'{v}'" + (f" (did you mean '{near}'?)" if near else ""))
    return ", ".join(shown)


def find_oddities(encoder: AttributeEncoder, attributes: pd.DataFrame) -> Oddities:
    """Check ``attributes`` against the fitted ``encoder`` (see the module doc)."""
    n = len(attributes)
    notes = [[] for _ in range(n)]
    summary = []
    for block in encoder.blocks_:
        col, kind = block["column"], block["type"]
        if col not in attributes.columns:
            summary.append(f"column '{col}' ({kind}) is missing from the table: every item is scored "
                           "without it")
            for row in notes:
                row.append(f"no {col}")
            continue
        values = attributes[col]
        if kind in ("category", "tags"):
            known = block["categories" if kind == "category" else "tags"]
            known_set = set(known)
            cells = ([[c] if c else [] for c in values.fillna("").astype(str).str.strip()] if kind == "category"
                     else split_tags(values, encoder.tag_separator))
            unseen = {}
            for j, cell in enumerate(cells):
                new = [c for c in cell if c not in known_set]
                if new:
                    notes[j].append(f"{col} '{new[0]}' never seen in training")
                    for c in new:
                        unseen.setdefault(c, _near(c, known))
            if unseen:
                rows = sum(1 for cell in cells if any(c not in known_set for c in cell))
                summary.append(f"column '{col}': {rows} item(s) with values never seen in training, e.g. "
                               f"{_examples(list(unseen.items()))}; they add nothing to the projection")
        elif kind == "number" and "low" in block:
            x = number_values(values)
            low, high = block["low"], block["high"]
            out = np.isfinite(x) & ((x < low) | (x > high))
            if out.any():
                excess = np.where(x > high, x - high, low - x)
                for j in np.flatnonzero(out):
                    notes[j].append(f"{col} {x[j]:g} outside the training range [{low:g}, {high:g}]")
                summary.append(f"column '{col}': {int(out.sum())} item(s) outside the training range "
                               f"[{low:g}, {high:g}], by up to {float(excess[out].max()):g}")
        elif kind == "text" and block["vocabulary"]:
            empty = np.asarray(encoder.transform_column(block, values).getnnz(axis=1) == 0)
            has_text = values.fillna("").astype(str).str.strip().ne("").to_numpy()
            blank = empty & has_text
            for j in np.flatnonzero(blank):
                notes[j].append(f"{col}: no known word")
            if blank.any():
                summary.append(f"column '{col}': {int(blank.sum())} item(s) whose text has no word the model "
                               "knows; it adds nothing to the projection")
    return Oddities(["; ".join(row) for row in notes], summary)
