"""The estimator's side of the model file: which fitted attributes become which arrays and
manifest entries, and back.  The file's container (zip, digests, version gate) is
:mod:`hybrid.io.store`'s; this module never opens a file itself."""
from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp

from hybrid.common.limits import upgrade_settings
from hybrid.core.steps import Factors
from hybrid.estimator.features import AttributeEncoder
from hybrid.io.store import bad_file, read_manifest, write_model_file

_WHERE_IT_RAN = ("engine", "address", "partitions", "shared_dir")


def model_arrays(model) -> dict[str, np.ndarray]:
    """The arrays a model file holds, by name."""
    F = model.check_fitted()
    A = model.attributes_.tocsr()
    u, i, r = model.ratings_
    arrays = {"user_ids": model.user_ids_.astype(str), "item_ids": model.item_ids_.astype(str),
              "user_blocks": F.user, "item_blocks": F.item, "map": F.W, "prior_precision": F.P,
              "prior_weight": model.prior_weight_, "launched": model.launched_, "ratings_user": u, "ratings_item": i,
              "ratings_value": r, "attr_data": A.data, "attr_indices": A.indices,
              "attr_indptr": A.indptr, "attr_shape": np.array(A.shape, dtype=np.int64)}
    if F.spread is not None:
        arrays["prior_covariance"] = F.spread
    table = model.item_table_
    if table is not None:
        for col in table.columns:
            arrays[f"table_{col}"] = table[col].to_numpy(dtype=str)
    for name, arr in model.extras_.items():
        arrays[f"extra_{name}"] = np.asarray(arr)
    return arrays


def save_model(model, path) -> None:
    """Write ``model`` to ``path`` atomically (JSON manifest and arrays, no pickle)."""
    table = model.item_table_
    manifest = {
        "params": model.get_params(), "settings": model.settings_,
        "features": model.features_.get_state(), "metrics": model.metrics_,
        "history": model.history_, "mu": model.mu_, "sigma2": model.sigma2_,
        "sigma2_new": model.sigma2_new_, "launch_offset": model.launch_offset_,
        "launch_spread": model.launch_spread_,
        "biases": model.factors_.biases,
        "table_columns": [] if table is None else [str(c) for c in table.columns],
    }
    write_model_file(path, manifest, model_arrays(model))


def load_model(path, cls):
    """Read a model file written by :func:`save_model` as an instance of ``cls``
    (``HybridFactorModel.load`` and ``hybrid.load`` call this).

    Examples
    --------
    >>> import os, tempfile
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=2, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=3, schema=club.schema).fit(club.ratings, club.lots)
    >>> p = os.path.join(tempfile.mkdtemp(), "m.hybrid")
    >>> m.save(p)
    >>> bool((load_model(p, HybridFactorModel).item_blocks_ == m.item_blocks_).all())
    True
    """
    manifest, arrays = read_manifest(path)
    try:
        return model_from_file(manifest, arrays, cls)
    except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
        # the digests vouch for the arrays, not for a hand-edited manifest
        detail = f"'{exc.args[0]}'" if isinstance(exc, KeyError) and exc.args else type(exc).__name__
        raise bad_file(path, f"its manifest lacks or mistypes an entry ({detail})") from None


def model_from_file(manifest: dict, a: dict, cls):
    """The model (an instance of ``cls``) from a checked manifest and its arrays."""
    # where a model was fitted was a setting in files before the engine became fit's argument:
    # it is provenance, and loading never depends on it
    params = {k: v for k, v in manifest["params"].items() if k not in _WHERE_IT_RAN}
    unknown = sorted(set(params) - set(cls().get_params()))
    if unknown:
        raise KeyError(f"params.{unknown[0]}")
    # files before version 3 were fitted at exactly their rank
    model = cls(**{"rank_choice": "fixed", **params})
    metrics = manifest["metrics"]
    item_ids = a["item_ids"]
    ratings = (a["ratings_user"], a["ratings_item"], a["ratings_value"])
    if manifest["format_version"] == 1:   # no offset then: new items sat at their projection
        launched = np.bincount(ratings[1], minlength=len(item_ids)) == 0
        offset = 0.0
    else:
        launched, offset = a["launched"].astype(bool), float(manifest["launch_offset"])
    columns = manifest.get("table_columns", [])
    table = (pd.DataFrame({c: a[f"table_{c}"] for c in columns}, index=pd.Index(item_ids, name="item"))
             if columns else None)
    F = Factors(a["user_blocks"], a["item_blocks"], a["map"], a["prior_precision"],
                bool(manifest["biases"]), list(manifest["history"]), spread=a.get("prior_covariance"))
    return model.set_fitted(
        # files that keep a setting's old name read as if written with the new
        settings_=upgrade_settings(manifest.get("settings")),
        features_=AttributeEncoder.from_state(manifest["features"]),
        user_ids_=a["user_ids"], item_ids_=item_ids, ratings_=ratings, item_table_=table,
        attributes_=sp.csr_matrix((a["attr_data"], a["attr_indices"], a["attr_indptr"]),
                                  shape=tuple(a["attr_shape"])),
        factors_=F, mu_=float(manifest["mu"]), sigma2_=float(manifest["sigma2"]),
        sigma2_new_=float(manifest["sigma2_new"]), prior_weight_=a["prior_weight"],
        # files before version 4 were fitted with the penalties their settings name
        **{name + "_": float(metrics.get(name, params[name])) for name in ("lam_user", "lam_item", "lam_map")},
        penalty_path_=[tuple(p) for p in metrics.get("penalty_path", [])],
        launched_=launched, launch_offset_=offset, metrics_=metrics,
        # files before the scores had intervals did not measure the spread
        launch_spread_=float(manifest.get("launch_spread", float("nan"))),
        rank_=int(metrics.get("rank", model.rank)), rank_path_=[tuple(p) for p in metrics.get("rank_path", [])],
        extras_={k[len("extra_"):]: v for k, v in a.items() if k.startswith("extra_")})
