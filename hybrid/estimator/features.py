"""Turn item attributes into a sparse design matrix.

Column kinds: ``text`` (TF-IDF, scikit-learn), ``category`` (one-hot),
``tags`` (multi-hot over a separator), ``number`` (median-imputed and
standardised); an intercept column comes first.  The fitted state is plain
data (lists and floats) so the model file never needs pickle, and
:meth:`AttributeEncoder.from_state` rebuilds an encoder that transforms new
rows exactly as the original did.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp
from sklearn.feature_extraction.text import CountVectorizer, TfidfVectorizer
from sklearn.preprocessing import normalize

from hybrid.common.errors import InputError


def _texts(values: pd.Series) -> list[str]:
    return values.fillna("").astype(str).tolist()


def number_values(values: pd.Series) -> np.ndarray:
    """A column of numbers as floats (blank and unreadable cells are NaN)."""
    x = pd.to_numeric(values.astype(str).str.strip().replace({"": None, "nan": None}), errors="coerce")
    return x.to_numpy(dtype=float)


def split_tags(values: pd.Series, sep: str) -> list[list[str]]:
    return [[t.strip() for t in str(v).split(sep) if t.strip()] if isinstance(v, str) else []
            for v in values.fillna("")]


def _indicator(rows: list[list[int]], n_cols: int) -> sp.csr_matrix:
    lengths = np.fromiter((len(r) for r in rows), dtype=np.int64, count=len(rows))
    indptr = np.concatenate([[0], np.cumsum(lengths)])
    indices = np.fromiter((c for r in rows for c in r), dtype=np.int64, count=int(indptr[-1]))
    data = np.ones(len(indices))
    return sp.csr_matrix((data, indices, indptr), shape=(len(rows), n_cols))


class AttributeEncoder:
    """Fit and apply the attribute-to-feature transform.

    Parameters
    ----------
    schema : dict
        ``{column: {"type": kind, "weight": w}}`` or ``{column: kind}``.
    text_max_features, text_min_df, text_ngrams : int
        Passed to ``TfidfVectorizer`` (``ngram_range=(1, text_ngrams)``).
    tag_separator : str
        Separator of the tags inside one cell.

    Examples
    --------
    >>> df = pd.DataFrame({"notes": ["cherry cocoa", "cocoa"], "origin": ["A", "B"],
    ...                    "price": [10.0, None]})
    >>> enc = AttributeEncoder({"notes": "text", "origin": "category", "price": "number"},
    ...                        text_min_df=1).fit(df)
    >>> enc.transform(df).shape
    (2, 6)
    """

    def __init__(self, schema, text_max_features=2000, text_min_df=2, text_ngrams=1,
                 tag_separator="|"):
        self.schema = schema
        self.text_max_features = text_max_features
        self.text_min_df = text_min_df
        self.text_ngrams = text_ngrams
        self.tag_separator = tag_separator

    def spec(self):
        out = {}
        for col, spec in self.schema.items():
            spec = {"type": spec} if isinstance(spec, str) else dict(spec)
            if spec["type"] != "ignore":
                out[col] = {"type": spec["type"], "weight": float(spec.get("weight", 1.0))}
        return out

    def fit(self, attributes: pd.DataFrame) -> "AttributeEncoder":
        """Learn vocabularies, categories and number scales from ``attributes``."""
        blocks = []
        for col, spec in self.spec().items():
            if col not in attributes.columns:
                raise InputError(f"declared attribute column '{col}' is not in the table", column=col)
            values = attributes[col]
            block = {"column": col, "type": spec["type"], "weight": spec["weight"]}
            block.update(getattr(self, f"_fit_{spec['type']}")(values))
            blocks.append(block)
        self.blocks_ = blocks
        self.feature_names_ = ["(intercept)"] + [
            f"{b['column']}={name}" for b in blocks for name in self._names(b)]
        self.n_features_ = len(self.feature_names_)
        return self

    def _fit_text(self, values):
        texts = _texts(values)
        for min_df in (self.text_min_df, 1):
            vec = TfidfVectorizer(min_df=min(min_df, len(texts)), max_features=self.text_max_features,
                                  ngram_range=(1, self.text_ngrams))
            try:
                vec.fit(texts)
                return {"vocabulary": vec.get_feature_names_out().tolist(), "idf": vec.idf_.tolist()}
            except ValueError:  # empty vocabulary at this min_df
                continue
        return {"vocabulary": [], "idf": []}

    def _fit_category(self, values):
        v = values.fillna("").astype(str).str.strip()
        return {"categories": sorted(set(v[v != ""]))}

    def _fit_tags(self, values):
        return {"tags": sorted({t for row in split_tags(values, self.tag_separator) for t in row})}

    def _fit_number(self, values):
        x = number_values(values)
        median = float(np.nanmedian(x)) if np.isfinite(x).any() else 0.0
        x = np.where(np.isfinite(x), x, median)
        scale = float(x.std())
        # the range seen, so that scoring can say (and clip) what lies outside it
        return {"median": median, "mean": float(x.mean()), "scale": scale if scale > 0 else 1.0,
                "low": float(x.min()) if len(x) else median, "high": float(x.max()) if len(x) else median}

    @staticmethod
    def _names(block):
        kind = block["type"]
        if kind == "text":
            return block["vocabulary"]
        if kind == "category":
            return block["categories"]
        if kind == "tags":
            return block["tags"]
        return ["(value)"]

    def transform(self, attributes: pd.DataFrame, clip_numbers: bool = False) -> sp.csr_matrix:
        """The design matrix, one row per row of ``attributes``.

        Columns the model knows but the table lacks give zero features (an
        unknown category likewise), so new items are scored on what they have.
        """
        n = len(attributes)
        parts = [sp.csr_matrix(np.ones((n, 1)))]
        for block in self.blocks_:
            col = block["column"]
            width = len(self._names(block))
            if col not in attributes.columns:
                parts.append(sp.csr_matrix((n, width)))
                continue
            parts.append(self.transform_column(block, attributes[col], clip_numbers) * block["weight"])
        return sp.hstack(parts, format="csr")

    def transform_column(self, block, values, clip_numbers=False):
        """One attribute column's features (before its weight); ``clip_numbers`` holds numbers
        to the range seen in training (models saved before ranges were kept are not clipped)."""
        if block["type"] == "number":
            return self._apply_number(block, values, clip_numbers)
        return getattr(self, f"_apply_{block['type']}")(block, values)

    def _apply_text(self, block, values):
        if not block["vocabulary"]:
            return sp.csr_matrix((len(values), 0))
        counts = CountVectorizer(vocabulary=block["vocabulary"], ngram_range=(1, self.text_ngrams)
                                 ).transform(_texts(values))
        return normalize(counts.multiply(np.asarray(block["idf"])[None, :]).tocsr(), norm="l2")

    def _apply_category(self, block, values):
        index = {c: j for j, c in enumerate(block["categories"])}
        v = values.fillna("").astype(str).str.strip()
        return _indicator([[index[c]] if c in index else [] for c in v], len(index))

    def _apply_tags(self, block, values):
        index = {t: j for j, t in enumerate(block["tags"])}
        rows = [[index[t] for t in dict.fromkeys(r) if t in index]
                for r in split_tags(values, self.tag_separator)]
        return _indicator(rows, len(index))

    def _apply_number(self, block, values, clip=False):
        x = number_values(values)
        x = np.where(np.isfinite(x), x, block["median"])
        if clip and "low" in block:
            x = np.clip(x, block["low"], block["high"])
        return sp.csr_matrix(((x - block["mean"]) / block["scale"])[:, None])

    def get_state(self) -> dict:
        """Plain-data state (JSON-serialisable) of the fitted encoder."""
        return {"params": {"schema": self.spec(), "text_max_features": self.text_max_features,
                           "text_min_df": self.text_min_df, "text_ngrams": self.text_ngrams,
                           "tag_separator": self.tag_separator},
                "blocks": self.blocks_}

    @classmethod
    def from_state(cls, state: dict) -> "AttributeEncoder":
        """Rebuild a fitted encoder from :meth:`get_state` output."""
        enc = cls(**state["params"])
        enc.blocks_ = state["blocks"]
        enc.feature_names_ = ["(intercept)"] + [
            f"{b['column']}={name}" for b in enc.blocks_ for name in cls._names(b)]
        enc.n_features_ = len(enc.feature_names_)
        return enc
