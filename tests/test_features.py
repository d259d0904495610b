"""Attribute encoding, checked against scikit-learn's own transformers."""
import json

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.feature_extraction.text import TfidfVectorizer
from sklearn.impute import SimpleImputer
from sklearn.preprocessing import StandardScaler

from hybrid.estimator.features import AttributeEncoder

TABLE = pd.DataFrame({
    "notes": ["cherry cocoa cocoa", "jasmine lime", "cocoa fudge", "", "lime cherry jasmine"],
    "region": ["Serra Nubla", "Valle Ondoro", "Serra Nubla", None, "Rio Pequel"],
    "certs": ["organic|microlot", "", "organic", "microlot|organic|organic", "shade-grown"],
    "price": [12.0, None, 9.5, 20.0, 14.0],
}, index=pd.Index(list("abcde"), name="item"))
SCHEMA = {"notes": "text", "region": "category", "certs": "tags", "price": {"type": "number", "weight": 2.0}}


def encoder():
    return AttributeEncoder(SCHEMA, text_min_df=1).fit(TABLE)


def test_text_block_equals_sklearn_tfidf():
    # reference: sklearn.feature_extraction.text.TfidfVectorizer with the same settings
    X = encoder().transform(TABLE).toarray()
    ref = TfidfVectorizer(min_df=1).fit_transform(TABLE["notes"]).toarray()
    assert np.allclose(X[:, 1:1 + ref.shape[1]], ref, atol=1e-12)


def test_numbers_equal_sklearn_median_imputer_and_scaler():
    # reference: sklearn SimpleImputer(strategy="median") then StandardScaler, times the weight
    X = encoder().transform(TABLE).toarray()
    ref = StandardScaler().fit_transform(SimpleImputer(strategy="median").fit_transform(TABLE[["price"]]))
    assert np.allclose(X[:, -1], 2.0 * ref[:, 0])


def test_categories_tags_intercept_and_unknowns():
    enc = encoder()
    names = enc.feature_names_
    X = enc.transform(TABLE).toarray()
    assert names[0] == "(intercept)" and np.all(X[:, 0] == 1)
    region = [j for j, n in enumerate(names) if n.startswith("region=")]
    assert X[:, region].sum(axis=1).tolist() == [1, 1, 1, 0, 1]   # missing -> no category
    certs = {n: j for j, n in enumerate(names) if n.startswith("certs=")}
    assert X[3, certs["certs=organic"]] == 1 and X[3, certs["certs=microlot"]] == 1
    new = pd.DataFrame({"notes": ["unheard words"], "region": ["Atlantis"], "certs": ["new-tag"],
                        "price": [12.0]})
    Xn = enc.transform(new).toarray()
    assert Xn[0, region].sum() == 0 and Xn[0, list(certs.values())].sum() == 0


def test_reloaded_state_transforms_identically():
    enc = encoder()
    state = json.loads(json.dumps(enc.get_state()))   # exactly what the model file stores
    again = AttributeEncoder.from_state(state)
    new = TABLE.iloc[[4, 0]].assign(notes=["cocoa lime", "fudge"])
    assert (again.transform(new) != enc.transform(new)).nnz == 0
    assert again.feature_names_ == enc.feature_names_


words = st.sampled_from(["cocoa", "plum", "lime", "cedar", "jasmine", ""])


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.lists(words, max_size=4), st.sampled_from(["A", "B", "", "C"]),
                          st.one_of(st.none(), st.floats(-1e6, 1e6))), min_size=1, max_size=12))
def test_any_table_encodes_to_finite_rows(rows):
    df = pd.DataFrame({"notes": [" ".join(r[0]) for r in rows], "region": [r[1] for r in rows],
                       "certs": ["|".join(r[0]) for r in rows], "price": [r[2] for r in rows]})
    enc = AttributeEncoder(SCHEMA, text_min_df=1).fit(df)
    X = enc.transform(df)
    assert X.shape == (len(df), enc.n_features_)
    assert np.isfinite(X.data).all()
