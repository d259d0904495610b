"""Write outputs atomically: to a temporary file beside the target, then rename.

A failure part-way (bad input found late, a full disk, Ctrl-C) leaves the
target untouched and no temporary file behind.
"""
from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

import pandas as pd

from hybrid.common.errors import InputError
from hybrid.io.database import check_database_target, is_database

# what each kind of output may be written as, by the file's ending (one place for the rule)
ENDINGS = {
    "table": {".csv": "csv", ".json": "json", ".jsonl": "jsonl", ".ndjson": "jsonl", ".parquet": "parquet"},
    "report": {".html": "html", ".htm": "html"},
    "settings": {".toml": "toml"},
}


def check_model_output(path: str | Path) -> Path:
    """A model file may have any name but one that says it is another kind of file (a
    ``--out scores.csv`` given to ``train`` is a mistake); then :func:`check_writable`.

    >>> check_model_output("club.csv")
    Traceback (most recent call last):
    ...
    hybrid.common.errors.InputError: club.csv: a model file is not a table, a report or settings; name it e.g. club.hybrid
    """
    path = Path(path)
    if any(path.suffix.lower() in endings for endings in ENDINGS.values()):
        raise InputError("a model file is not a table, a report or settings; name it e.g. "
                         f"{path.stem}.hybrid", file=str(path))
    return check_writable(path)


def output_format(path: str | Path, kind: str = "table") -> str:
    """The format an output's ending asks for; an unknown ending is an error before any work.

    >>> output_format("plan.parquet"), output_format("scores.JSONL")
    ('parquet', 'jsonl')
    >>> output_format("scores.xlsx")
    Traceback (most recent call last):
    ...
    hybrid.common.errors.InputError: scores.xlsx: unknown file ending '.xlsx'; write .csv, .json, .jsonl, .ndjson or .parquet
    """
    path = Path(path)
    endings = ENDINGS[kind]
    if path.suffix.lower() not in endings:
        names = list(endings)
        listed = ", ".join(names[:-1]) + " or " + names[-1] if len(names) > 1 else names[0]
        raise InputError(f"unknown file ending '{path.suffix or '(none)'}'; write {listed}", file=str(path))
    return endings[path.suffix.lower()]


def check_output(path: str | Path, kind: str = "table"):
    """:func:`check_writable` and :func:`output_format` in one: call before the work starts.
    A table may also go to a database (``URL#table``, :mod:`hybrid.io.database`)."""
    if kind == "table" and is_database(path):
        return check_database_target(str(path))
    output_format(path, kind)
    return check_writable(path)


def write_table(df: pd.DataFrame, path: str | Path) -> None:
    """CSV, JSON (a list of records), JSON Lines or Parquet, by the file's ending; atomically."""
    fmt = output_format(path)
    with atomic_path(path) as tmp:
        if fmt == "json":
            tmp.write_text(df.to_json(orient="records", double_precision=10), encoding="utf-8")
        elif fmt == "jsonl":
            df.to_json(tmp, orient="records", lines=True, double_precision=10)
        elif fmt == "parquet":
            df.to_parquet(tmp, index=False)
        else:
            df.to_csv(tmp, index=False, float_format="%.6g")


def check_writable(path: str | Path) -> Path:
    """Refuse an output path whose folder does not exist (before any work is done)."""
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise InputError(f"cannot write here: folder '{folder}' does not exist", file=str(path))
    if path.is_dir():
        raise InputError("cannot write here: this is a folder, expected a file name", file=str(path))
    # the folder's permission bits do not tell (root ignores them, a file system may be
    # read-only): create and remove a file there, as the atomic write will
    try:
        fd, probe = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".probe", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise InputError(f"cannot write in folder '{folder}': {(exc.strerror or str(exc)).lower()}",
                         file=str(path)) from None
    return path


@contextlib.contextmanager
def atomic_path(path: str | Path):
    """Yield a temporary path; rename it onto ``path`` only if the block succeeds.

    Examples
    --------
    >>> import os, tempfile
    >>> target = os.path.join(tempfile.mkdtemp(), "out.txt")
    >>> with atomic_path(target) as tmp:
    ...     _ = open(tmp, "w").write("done")
    >>> open(target).read()
    'done'
    """
    path = check_writable(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        # mkstemp makes the file private; give it the usual permissions (umask applies)
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
