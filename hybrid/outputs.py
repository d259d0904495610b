"""Write outputs atomically: to a temporary file beside the target, then rename.

A failure part-way (bad input found late, a full disk, Ctrl-C) leaves the
target untouched and no temporary file behind.
"""
from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

from .errors import InputError


def check_writable(path: str | Path) -> Path:
    """Refuse an output path whose folder does not exist (before any work is done)."""
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise InputError(f"cannot write here: folder '{folder}' does not exist", file=str(path))
    if path.is_dir():
        raise InputError("cannot write here: this is a folder, expected a file name", file=str(path))
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
