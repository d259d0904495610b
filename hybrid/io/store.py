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

from hybrid.common.errors import InputError
from hybrid.io.outputs import atomic_path

FORMAT = "hybrid-model"
VERSION = 4           # 2: the launch offset and which items carry it; 3: the rank search; 4: chosen penalties
READS = (1, 2, 3, 4)  # version 1 was fitted without the offset (reads as offset 0); 1 and 2 at a fixed rank


def _digest(arr: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(arr).tobytes()).hexdigest()


def write_model_file(path, manifest: dict, arrays: dict[str, np.ndarray]) -> None:
    """Write ``manifest`` (JSON) and ``arrays`` (``.npy``) to ``path`` atomically.

    The format's name and version, each array's digest and the file's checksum are added here;
    what the arrays and entries mean is the estimator's business (:mod:`hybrid.estimator.persist`).
    """
    manifest = {"format": FORMAT, "format_version": VERSION, **manifest,
                "arrays": {k: {"sha256": _digest(v), "shape": list(v.shape), "dtype": str(v.dtype)}
                           for k, v in arrays.items()}}
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


def bad_file(path, why) -> InputError:
    """The error for a model file that cannot be used, naming the file."""
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
        raise bad_file(path, "its manifest has no table of arrays")
    total = 0
    for name, meta in entries.items():
        try:
            ok = (_NAME.match(str(name)) and isinstance(meta, dict) and isinstance(meta.get("sha256"), str)
                  and all(isinstance(n, int) and n >= 0 for n in meta["shape"])
                  and np.dtype(meta["dtype"]).kind not in "OV")
            size = zf.getinfo(f"arrays/{name}.npy").file_size if ok else 0
        except KeyError:
            raise bad_file(path, f"array '{name}' is missing") from None
        except (TypeError, ValueError):
            ok = False
        if not ok:
            raise bad_file(path, f"the manifest's entry for array {str(name)[:40]!r} is malformed")
        if size > _member_limit(meta):
            raise bad_file(path, f"array '{name}' declares {size} bytes, more than its shape holds")
        total += size
    if total > _MOST_INFLATION * Path(path).stat().st_size + (16 << 20):
        raise bad_file(path, f"its arrays would inflate to {total} bytes, over {_MOST_INFLATION} times the file")
    return entries.items()


def read_manifest(path) -> tuple[dict, dict]:
    """Return (manifest, arrays) after checking format, version and digests."""
    path = Path(path)
    if not path.is_file():
        raise InputError("model file not found", file=str(path))
    try:
        zf = zipfile.ZipFile(path)
    except _DAMAGED:
        raise bad_file(path, "it is not a hybrid model (no model archive found; truncated or another kind of file)") from None
    with zf:
        try:
            manifest = json.loads(zf.read("manifest.json"))
        except KeyError:
            raise bad_file(path, "it has no manifest (another kind of zip file)") from None
        except _DAMAGED as exc:
            raise bad_file(path, f"its manifest is damaged ({type(exc).__name__})") from None
        if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
            raise bad_file(path, "its manifest is not a hybrid model manifest")
        if manifest.get("format_version") not in READS:
            raise bad_file(path, f"format version {manifest.get('format_version')!r}; this hybrid reads versions "
                             f"{', '.join(map(str, READS))}")
        arrays = {}
        for name, meta in _array_entries(path, zf, manifest):
            try:
                with zf.open(f"arrays/{name}.npy") as member:   # never more than it declared
                    raw = member.read(_member_limit(meta) + 1)
                arr = np.load(io.BytesIO(raw), allow_pickle=False)
            except (KeyError, *_DAMAGED) as exc:
                raise bad_file(path, f"array '{name}' is missing or damaged ({type(exc).__name__})") from None
            if _digest(arr) != meta["sha256"]:
                raise bad_file(path, f"array '{name}' does not match its checksum (the file was altered or damaged)")
            arrays[name] = arr
    return manifest, arrays
