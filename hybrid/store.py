"""The model file: a zip holding a JSON manifest and ``.npy`` arrays.

No pickle anywhere: arrays are read with ``allow_pickle=False`` and every
other piece of state (settings, the attribute encoder, metrics) is JSON.
The manifest records a format version and a SHA-256 digest of every array,
so a truncated, corrupted or foreign file is refused with a clear message
instead of producing wrong numbers.
"""
from __future__ import annotations

import hashlib
import io
import json
import re
import struct
import zipfile
import zlib
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse as sp

from .errors import InputError
from .outputs import atomic_path

FORMAT = "hybrid-model"
VERSION = 4           # 2: the launch offset and which items carry it; 3: the rank search; 4: chosen penalties
READS = (1, 2, 3, 4)  # version 1 was fitted without the offset (reads as offset 0); 1 and 2 at a fixed rank


def _digest(arr: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(arr).tobytes()).hexdigest()


def _arrays(model) -> dict[str, np.ndarray]:
    F = model.factors_
    A = model.attributes_.tocsr()
    u, i, r = model.ratings_
    arrays = {"user_ids": model.user_ids_.astype(str), "item_ids": model.item_ids_.astype(str),
              "user_blocks": F.user, "item_blocks": F.item, "map": F.W, "prior_precision": F.P,
              "prior_weight": model.prior_weight_, "launched": model.launched_, "ratings_user": u, "ratings_item": i,
              "ratings_value": r, "attr_data": A.data, "attr_indices": A.indices,
              "attr_indptr": A.indptr, "attr_shape": np.array(A.shape, dtype=np.int64)}
    if F.spread is not None:
        arrays["prior_covariance"] = F.spread
    table = getattr(model, "item_table_", None)
    if table is not None:
        for col in table.columns:
            arrays[f"table_{col}"] = table[col].to_numpy(dtype=str)
    for name, arr in getattr(model, "extras_", {}).items():
        arrays[f"extra_{name}"] = np.asarray(arr)
    return arrays


def save_model(model, path) -> None:
    """Write ``model`` to ``path`` atomically."""
    arrays = _arrays(model)
    table = getattr(model, "item_table_", None)
    manifest = {
        "format": FORMAT, "format_version": VERSION,
        "params": model.get_params(), "settings": getattr(model, "settings_", None),
        "features": model.features_.get_state(), "metrics": model.metrics_,
        "history": model.history_, "mu": model.mu_, "sigma2": model.sigma2_,
        "sigma2_new": model.sigma2_new_, "launch_offset": model.launch_offset_,
        "biases": model.factors_.biases,
        "table_columns": [] if table is None else [str(c) for c in table.columns],
        "arrays": {k: {"sha256": _digest(v), "shape": list(v.shape), "dtype": str(v.dtype)}
                   for k, v in arrays.items()},
    }
    manifest["checksum"] = hashlib.sha256(
        "".join(manifest["arrays"][k]["sha256"] for k in sorted(arrays)).encode()).hexdigest()
    with atomic_path(path) as tmp:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
            zf.writestr("manifest.json", json.dumps(manifest, allow_nan=True))
            for name, arr in arrays.items():
                buf = io.BytesIO()
                np.save(buf, arr, allow_pickle=False)
                zf.writestr(f"arrays/{name}.npy", buf.getvalue())


# what a damaged archive can raise while it is read (a flipped byte can change a member's
# compression method or flags as well as its data)
_DAMAGED = (ValueError, zipfile.BadZipFile, OSError, EOFError, zlib.error, struct.error, NotImplementedError,
            RuntimeError)


def _bad(path, why):
    return InputError(f"not a usable model file: {why}", file=str(path))


_NAME = re.compile(r"[A-Za-z0-9_]{1,200}\Z")
# a model's arrays compress about 3x (48x at most for a column of repeated dates); a file
# declaring more than this multiple of its own size is refused before anything is inflated
_MOST_INFLATION = 200
_HEADER = 4096           # room for an .npy header (numpy writes about 128 bytes)


def _member_limit(meta) -> int:
    """Bytes an array of the declared shape and dtype takes as ``.npy``, header included."""
    return int(np.prod(meta["shape"], dtype=np.int64)) * np.dtype(meta["dtype"]).itemsize + _HEADER


def _array_entries(path, zf, manifest):
    """The manifest's arrays, each checked before any is read: a plain name (no path that
    could climb out of the archive), a shape and a non-object dtype, a member whose declared
    size fits that shape, and in all no more than ``_MOST_INFLATION`` times the file."""
    entries = manifest.get("arrays")
    if not isinstance(entries, dict):
        raise _bad(path, "its manifest has no table of arrays")
    total = 0
    for name, meta in entries.items():
        try:
            ok = (_NAME.match(str(name)) and isinstance(meta, dict) and isinstance(meta.get("sha256"), str)
                  and all(isinstance(n, int) and n >= 0 for n in meta["shape"])
                  and np.dtype(meta["dtype"]).kind not in "OV")
            size = zf.getinfo(f"arrays/{name}.npy").file_size if ok else 0
        except KeyError:
            raise _bad(path, f"array '{name}' is missing") from None
        except (TypeError, ValueError):
            ok = False
        if not ok:
            raise _bad(path, f"the manifest's entry for array {str(name)[:40]!r} is malformed")
        if size > _member_limit(meta):
            raise _bad(path, f"array '{name}' declares {size} bytes, more than its shape holds")
        total += size
    if total > _MOST_INFLATION * Path(path).stat().st_size + (16 << 20):
        raise _bad(path, f"its arrays would inflate to {total} bytes, over {_MOST_INFLATION} times the file")
    return entries.items()


def read_manifest(path) -> tuple[dict, dict]:
    """Return (manifest, arrays) after checking format, version and digests."""
    path = Path(path)
    if not path.is_file():
        raise InputError("model file not found", file=str(path))
    try:
        zf = zipfile.ZipFile(path)
    except _DAMAGED:
        raise _bad(path, "it is not a hybrid model (no model archive found; truncated or another kind of file)") from None
    with zf:
        try:
            manifest = json.loads(zf.read("manifest.json"))
        except KeyError:
            raise _bad(path, "it has no manifest (another kind of zip file)") from None
        except _DAMAGED as exc:
            raise _bad(path, f"its manifest is damaged ({type(exc).__name__})") from None
        if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
            raise _bad(path, "its manifest is not a hybrid model manifest")
        if manifest.get("format_version") not in READS:
            raise _bad(path, f"format version {manifest.get('format_version')!r}; this hybrid reads versions "
                             f"{', '.join(map(str, READS))}")
        arrays = {}
        for name, meta in _array_entries(path, zf, manifest):
            try:
                with zf.open(f"arrays/{name}.npy") as member:   # never more than it declared
                    raw = member.read(_member_limit(meta) + 1)
                arr = np.load(io.BytesIO(raw), allow_pickle=False)
            except (KeyError, *_DAMAGED) as exc:
                raise _bad(path, f"array '{name}' is missing or damaged ({type(exc).__name__})") from None
            if _digest(arr) != meta["sha256"]:
                raise _bad(path, f"array '{name}' does not match its checksum (the file was altered or damaged)")
            arrays[name] = arr
    return manifest, arrays


def load_model(path):
    """Read a model file written by :func:`save_model`.

    Examples
    --------
    >>> import os, tempfile
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.samples import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=2, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=3, schema=club.schema).fit(club.ratings, club.lots)
    >>> p = os.path.join(tempfile.mkdtemp(), "m.hybrid")
    >>> m.save(p)
    >>> bool((load_model(p).item_blocks_ == m.item_blocks_).all())
    True
    """
    from .features import AttributeEncoder
    from .model import HybridFactorModel
    from .train import Factors

    manifest, a = read_manifest(path)
    try:
        return _build(manifest, a, HybridFactorModel, AttributeEncoder, Factors)
    except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
        # the digests vouch for the arrays, not for a hand-edited manifest
        detail = f"'{exc.args[0]}'" if isinstance(exc, KeyError) and exc.args else type(exc).__name__
        raise _bad(path, f"its manifest lacks or mistypes an entry ({detail})") from None


def _build(manifest, a, HybridFactorModel, AttributeEncoder, Factors):
    """The model from a checked manifest and its arrays."""
    params = manifest["params"]
    unknown = sorted(set(params) - set(HybridFactorModel().get_params()))
    if unknown:
        raise KeyError(f"params.{unknown[0]}")
    # files before version 3 were fitted at exactly their rank
    model = HybridFactorModel(**{"rank_choice": "fixed", **params})
    model.settings_ = manifest.get("settings")
    model.features_ = AttributeEncoder.from_state(manifest["features"])
    model.user_ids_, model.item_ids_ = a["user_ids"], a["item_ids"]
    model.ratings_ = (a["ratings_user"], a["ratings_item"], a["ratings_value"])
    model.attributes_ = sp.csr_matrix((a["attr_data"], a["attr_indices"], a["attr_indptr"]),
                                      shape=tuple(a["attr_shape"]))
    F = Factors(a["user_blocks"], a["item_blocks"], a["map"], a["prior_precision"],
                bool(manifest["biases"]), list(manifest["history"]), spread=a.get("prior_covariance"))
    model._set_factors(F, manifest["mu"], manifest["sigma2"], a["prior_weight"], manifest["sigma2_new"])
    # files before version 4 were fitted with the penalties their settings name
    metrics = manifest["metrics"]
    for name in ("lam_user", "lam_item", "lam_map"):
        setattr(model, name + "_", float(metrics.get(name, manifest["params"][name])))
    model.penalty_path_ = [tuple(p) for p in metrics.get("penalty_path", [])]
    if manifest["format_version"] == 1:   # no offset then: new items sat at their projection
        model.launched_, model.launch_offset_ = model.item_counts_ == 0, 0.0
    else:
        model.launched_, model.launch_offset_ = a["launched"].astype(bool), float(manifest["launch_offset"])
    model.metrics_ = manifest["metrics"]
    model.rank_ = int(manifest["metrics"].get("rank", model.rank))
    model.rank_path_ = [tuple(p) for p in manifest["metrics"].get("rank_path", [])]
    model.extras_ = {k[len("extra_"):]: v for k, v in a.items() if k.startswith("extra_")}
    columns = manifest.get("table_columns", [])
    model.item_table_ = pd.DataFrame({c: a[f"table_{c}"] for c in columns},
                                     index=pd.Index(model.item_ids_, name="item")) if columns else None
    return model
