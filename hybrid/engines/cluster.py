"""Train on a Dask cluster: the ratings as partitioned copies, solved block by block.

The ratings are written once as two partitioned Parquet datasets, one by
user block (for the user step) and one by item block (for the item step),
each block a contiguous range of rows with about the same number of
ratings.  Workers load their blocks from those files, so a block lost with a
worker is simply loaded again by another (Dask reschedules the lost tasks);
no worker ever holds the whole rating matrix.

Each half-step sends the fixed side's factors once (inside a task, so that
they can be computed again if the worker holding them dies), solves every
block with :func:`hybrid.core.blocks.solve_rows`, the very function the local
trainer uses, and gathers only the new factors.  The map step's right-hand side is a tree
reduction of each item block's share of the attribute normal equations.
:class:`ClusterRatingData` offers the same methods as
:class:`hybrid.core.train.RatingData`, so the trainer is one program for both.

Dask (``dask`` and ``distributed``) is an optional extra: from the clone, ``pip install -e
'.[dask]'``; nothing else in the package imports it.
"""
from __future__ import annotations

import contextlib
import functools
import shutil
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse as sp

from hybrid.common.errors import InputError
from hybrid.core import blocks

_RETRIES = 3


def _dask():
    try:
        import distributed
    except ImportError:  # the extra is not installed
        raise InputError("engine 'dask' needs the dask extra; from the clone: pip install -e '.[dask]'") from None
    return distributed


@contextlib.contextmanager
def connect(address: str | None = None, workers: int = 2):
    """A client of the cluster at ``address``, or of a local cluster of ``workers``
    processes started (and stopped) here."""
    distributed = _dask()
    if address:
        try:
            client = distributed.Client(address, timeout="5s")
        except OSError as exc:
            raise InputError(f"cannot reach the Dask scheduler at {address}: {exc}") from None
        with client:
            yield client
        return
    with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster, distributed.Client(cluster) as client:
        yield client


@contextlib.contextmanager
def engine_client(settings: dict):
    """A client for the ``[engine]`` settings, or ``None`` for the local engine."""
    engine = settings["engine"]
    if engine["kind"] != "dask":
        yield None
        return
    with connect(engine["address"] or None, engine["workers"]) as client:
        yield client


@contextlib.contextmanager
def training_data(model, engine):
    """A fitting model's ratings, here or partitioned on a Dask cluster for the fit, as
    ``engine`` (an :class:`~hybrid.engines.engine.Engine`) says (``mu`` always from these
    ratings, not an earlier fit)."""
    from hybrid.core.steps import RatingData
    u, i, r = model.ratings_
    n_users, n_items = len(model.user_ids_), len(model.item_ids_)
    if engine.kind == "local":
        yield RatingData.from_codes(u, i, r, n_users, n_items)
        return
    with connect(engine.address) as client:
        data = ClusterRatingData.from_codes(client, u, i, r, n_users, n_items, partitions=engine.partitions,
                                            shared_dir=engine.shared_dir, A=model.attributes_)
        try:
            yield data
        finally:
            data.close()


def on_a_worker(data, fn, *args, **kwargs):
    """``fn(*args, **kwargs)`` where ``data`` lives: here for local data, or as one task on a
    worker of ``data``'s cluster (retried elsewhere if that worker dies), its result brought
    back.  For work on a bounded sample that should not run on the client (the penalty search).

    >>> on_a_worker(None, divmod, 7, 2)
    (3, 1)
    """
    client = getattr(data, "client", None)
    if client is None:
        return fn(*args, **kwargs)
    return client.submit(functools.partial(fn, *args, **kwargs), pure=False, retries=_RETRIES).result()


def _bounds(counts, partitions):
    """Row ranges ``[lo, hi)`` of about equal numbers of ratings (at most ``partitions``)."""
    edges = np.searchsorted(np.cumsum(counts), np.linspace(0, counts.sum(), partitions + 1)[1:-1])
    cuts = np.unique(np.concatenate([[0], edges + 1, [len(counts)]]).clip(0, len(counts)))
    return list(zip(cuts[:-1].tolist(), cuts[1:].tolist()))


@dataclass(frozen=True)
class _Block:
    """Where one block's ratings live; loading it is a pure task."""

    path: str
    lo: int
    hi: int


def _load(block: _Block, drop_rows=None, drop_cols=None):
    """CSR of rows ``[lo, hi)`` (local row numbers, global column codes), less
    the ratings of dropped rows or columns."""
    t = pd.read_parquet(block.path)
    row, col, val = t["row"].to_numpy(), t["col"].to_numpy(), t["value"].to_numpy()
    keep = np.ones(len(row), bool)
    if drop_rows is not None:
        keep &= ~np.isin(row, drop_rows)
    if drop_cols is not None:
        keep &= ~np.isin(col, drop_cols)
    n = block.hi - block.lo
    indptr = np.concatenate([[0], np.cumsum(np.bincount(row[keep] - block.lo, minlength=n))])
    return indptr, col[keep].astype(np.int32), val[keep]


def _solve(R, fixed, prior_mean, weight, with_edf):
    F_ext, y_offset, P = fixed
    return blocks.solve_rows(*R, F_ext, y_offset, P, prior_mean, weight, 1, with_edf)


def _sse(R, rows_z, other_z, biases):
    return blocks.sse_rows(*R, rows_z, other_z, biases)


def _leverage(R, fixed, lam, members, rows=None):
    F_ext, y_offset = fixed
    if rows is not None:     # a block's own rows (local numbers) out of a sample of users
        indptr, indices, values = R
        part = sp.csr_matrix((values, indices, indptr), shape=(len(indptr) - 1, len(F_ext)))[rows]
        R = (part.indptr, part.indices, part.data)
    return blocks.leverage_rows(*R, F_ext, y_offset, lam, members)


def _rater_sums(R, users):
    return blocks.rater_sums(*R, users)


def _rhs_part(A, z, weight):
    z = z[0] if isinstance(z, tuple) else z   # a block solve's result, or the vectors themselves
    return np.asarray(A.T @ (weight[:, None] * z))


def _pick_rows(R, rows, n_cols):
    indptr, indices, values = R
    return sp.csr_matrix((values, indices, indptr), shape=(len(indptr) - 1, n_cols))[rows]


def _identity(value):
    return value


def put(client, value):
    """``value`` on the cluster, recoverably: it travels inside a task, so if the
    worker holding it dies the scheduler computes it again elsewhere (a
    scattered value would be lost with its worker, and a broadcast can stall
    while one is dying)."""
    with warnings.catch_warnings():  # a factor matrix is a large argument by design
        warnings.simplefilter("ignore", UserWarning)
        return client.submit(_identity, value, pure=False)


def _tree_sum(client, futures):
    """Pairwise sums on the workers until one is left (the reduction is a tree)."""
    while len(futures) > 1:
        pairs = [client.submit(np.add, a, b, pure=False, retries=_RETRIES)
                 for a, b in zip(futures[0::2], futures[1::2])]
        futures = pairs + ([futures[-1]] if len(futures) % 2 else [])
    return futures[0].result()


def _write_side(folder, rows, cols, values, n_rows, partitions):
    """One partitioned copy: a Parquet file per block of rows, sorted by (row, col)."""
    folder.mkdir(parents=True)
    order = np.lexsort((cols, rows))
    counts = np.bincount(rows, minlength=n_rows)
    starts = np.concatenate([[0], np.cumsum(counts)])
    out = []
    for b, (lo, hi) in enumerate(_bounds(counts, partitions)):
        # one block's ratings at a time: the client never holds a sorted copy of them all
        take = order[starts[lo]:starts[hi]]
        path = str(folder / f"block-{b:05d}.parquet")
        pd.DataFrame({"row": rows[take], "col": cols[take], "value": values[take]}).to_parquet(path, index=False)
        out.append(_Block(path, lo, hi))
    return out


class ClusterRatingData:
    """Ratings of ``r - mu`` partitioned by user and by item on a Dask cluster.

    Offers the methods of :class:`hybrid.core.train.RatingData` that the trainer
    uses; each runs a pure function of :mod:`hybrid.core.blocks` per block on the
    workers, which read the blocks from files under ``workdir`` (so it must
    be readable by every worker: a shared filesystem on a real cluster, any
    folder on one machine).  Views made by :meth:`without` share the files
    and the attribute blocks of the data they came from.

    Examples
    --------
    >>> import numpy as np
    >>> with connect(workers=1) as client:                       # doctest: +SKIP
    ...     data = ClusterRatingData.from_codes(client, [0, 1], [1, 0], [4.0, 2.0], 2, 2, partitions=2)
    ...     data.nnz, data.item_counts().tolist()
    (2, [1, 1])
    """

    def __init__(self, client, sides, shape, mu, item_counts, workdir, A_paths=None, drop=None, owner=False,
                 attributes=None):
        self.client = client
        self.sides = sides            # {"user": [_Block], "item": [_Block]}
        self._shape = tuple(shape)
        self.mu = float(mu)
        self._counts = item_counts    # ratings per item in this view
        self.workdir = workdir
        self.A_paths = A_paths
        self.drop = drop              # items whose ratings this view leaves out
        self._owner = owner
        self._last_items = None
        # each side's blocks are loaded on first use: a view for a held-out fold re-solves its
        # users only, and would otherwise hold a second copy of the item side on every worker
        self._futures = {}
        self._attributes = attributes if attributes is not None or A_paths is None else \
            [self._submit(sp.load_npz, p) for p in A_paths]

    @classmethod
    def from_codes(cls, client, users, items, ratings, n_users, n_items, mu=None, partitions=8,
                   shared_dir=None, A=None):
        """Write both partitioned copies in a new folder inside ``shared_dir`` (the
        system's temporary folder by default; on a real cluster, a folder every
        worker can read) and load them on the workers; :meth:`close` removes it.

        ``A`` (the attribute design matrix) is split by item block beside them,
        for the map step's reduction.
        """
        users, items = np.asarray(users, np.int64), np.asarray(items, np.int64)
        ratings = np.asarray(ratings, float)
        mu = float(np.mean(ratings)) if mu is None else float(mu)
        root = Path(tempfile.mkdtemp(prefix="hybrid-cluster-", dir=shared_dir or None))
        values = ratings - mu
        sides = {"user": _write_side(root / "by_user", users, items, values, n_users, partitions),
                 "item": _write_side(root / "by_item", items, users, values, n_items, partitions)}
        A_paths = None
        if A is not None:
            A = sp.csr_matrix(A)
            A_paths = []
            for b, blk in enumerate(sides["item"]):
                path = str(root / "by_item" / f"attributes-{b:05d}.npz")
                sp.save_npz(path, A[blk.lo:blk.hi])
                A_paths.append(path)
        counts = np.bincount(items, minlength=n_items)
        return cls(client, sides, (n_users, n_items), mu, counts, str(root), A_paths, None, owner=True)

    def close(self):
        """Release the blocks; remove the work folder if this object made it (views
        share it: close them first, or just drop them)."""
        for futures in list(self._futures.values()) + [self._attributes or []]:
            for f in futures:
                f.release()
        if self._owner:
            shutil.rmtree(self.workdir, ignore_errors=True)

    # ---------------------------------------------------------------- plumbing
    def _submit(self, fn, *args, near=None):
        # near: run where that block already is, if its worker is free (blocks stay put)
        hint = {} if near is None else {"workers": near, "allow_other_workers": True}
        return self.client.submit(fn, *args, pure=False, retries=_RETRIES, **hint)

    @property
    def loaded_sides(self) -> tuple:
        """The sides whose blocks this view has loaded on the workers (in the order loaded)."""
        return tuple(self._futures)

    def _blocks(self, side):
        """The futures of ``side``'s blocks on the workers (loaded on first use)."""
        if side not in self._futures:
            self._futures[side] = [self._submit(_load, b, *self._drops(side)) for b in self.sides[side]]
        return self._futures[side]

    def _homes(self, futures):
        """For each future, the workers holding it (None where unknown)."""
        held = self.client.who_has(futures)
        return [list(held.get(f.key, ())) or None for f in futures]

    def _drops(self, side):
        if self.drop is None:
            return (None, None)
        return (self.drop, None) if side == "item" else (None, self.drop)

    # ------------------------------------------------------- RatingData methods
    @property
    def nnz(self) -> int:
        return int(self._counts.sum())

    @property
    def shape(self) -> tuple:
        return self._shape

    def item_counts(self) -> np.ndarray:
        return self._counts.copy()

    def solve(self, side, F_ext, y_offset, P, prior_mean=None, weight=None, n_jobs=1, with_edf=False,
              rows=None):
        """One half-step over every block of ``side`` (see :meth:`RatingData.solve`)."""
        if rows is not None:
            raise InputError("the Dask engine re-solves whole sides only; fold new ratings in locally")
        fixed = put(self.client, (F_ext, y_offset, P))
        parts = []
        homes = self._homes(self._blocks(side))
        for blk, R, home in zip(self.sides[side], self._blocks(side), homes):
            pm = None if prior_mean is None else prior_mean[blk.lo:blk.hi]
            w = None if weight is None else weight[blk.lo:blk.hi]
            parts.append(self._submit(_solve, R, fixed, pm, w, with_edf, near=home))
        results = self.client.gather(parts)
        z = np.vstack([r[0] for r in results])
        if side == "item":  # kept on the workers for the map step's reduction
            self._last_items = (parts, z)
        return z, np.concatenate([r[1] for r in results]), float(sum(r[2] for r in results))

    def map_rhs(self, Z, weight):
        """``A^T diag(weight) Z`` (``weight`` zero for unrated items), summed as a tree
        over item blocks.

        The item step's results are used where they are still ``Z`` (they stay
        on the workers); otherwise the blocks of ``Z`` are sent.
        """
        if self._attributes is None:
            raise InputError("this data was built without attributes; pass A to from_codes")
        fresh = self._last_items is not None and np.array_equal(self._last_items[1], Z)
        parts = []
        for b, (blk, A_b) in enumerate(zip(self.sides["item"], self._attributes)):
            z = self._last_items[0][b] if fresh else Z[blk.lo:blk.hi]
            parts.append(self._submit(_rhs_part, A_b, z, weight[blk.lo:blk.hi]))
        return _tree_sum(self.client, parts)

    def sse(self, F) -> float:
        items = put(self.client, F.item)
        parts = [self._submit(_sse, R, F.user[blk.lo:blk.hi], items, F.biases)
                 for blk, R in zip(self.sides["user"], self._blocks("user"))]
        return float(sum(self.client.gather(parts)))

    def leverage(self, F_ext, y_offset, lam_user, members, users=None):
        """See :meth:`RatingData.leverage`: every user's, or those of ``users``."""
        fixed = put(self.client, (F_ext, y_offset))
        parts = []
        users = None if users is None else np.asarray(users)
        for blk, R in zip(self.sides["user"], self._blocks("user")):
            rows = None if users is None else users[(users >= blk.lo) & (users < blk.hi)] - blk.lo
            parts.append(self._submit(_leverage, R, fixed, lam_user, members, rows))
        results = self.client.gather(parts)
        return float(sum(r[0] for r in results)), int(sum(r[1] for r in results))

    def rater_sums(self, user_blocks):
        """See :meth:`RatingData.rater_sums`: summed on the workers, item block by item block."""
        users = put(self.client, user_blocks)
        parts = [self._submit(_rater_sums, R, users) for R in self._blocks("item")]
        results = self.client.gather(parts)
        return np.vstack([r[0] for r in results]), np.concatenate([r[1] for r in results])

    def without(self, held) -> "ClusterRatingData":
        """A view that leaves out the ratings of items ``held`` (same files, other tasks)."""
        held = np.unique(np.concatenate([np.asarray(held, np.int64),
                                         [] if self.drop is None else self.drop])).astype(np.int64)
        counts = self._counts.copy()
        counts[held] = 0
        return ClusterRatingData(self.client, self.sides, self._shape, self.mu, counts, self.workdir,
                                 self.A_paths, held, attributes=self._attributes)

    def item_rows(self, rows) -> sp.csr_matrix:
        rows = np.asarray(rows, np.int64)
        n_users = self._shape[0]
        pieces, where = [], []
        for blk, R in zip(self.sides["item"], self._blocks("item")):
            inside = np.flatnonzero((rows >= blk.lo) & (rows < blk.hi))
            if inside.size:
                pieces.append(self._submit(_pick_rows, R, rows[inside] - blk.lo, n_users))
                where.append(inside)
        stacked = sp.vstack(self.client.gather(pieces), format="csr")
        order = np.empty(len(rows), np.int64)
        order[np.concatenate(where)] = np.arange(len(rows))
        return stacked[order]


def _apply(fn, shared, chunk):
    return fn(shared, *chunk)


def map_chunks(client, fn, shared, chunks, window: int = 4):
    """Yield ``fn(shared, *chunk)`` for each chunk, in order, computed on the cluster.

    ``shared`` (or a future from :func:`put`) goes to the cluster once; at most
    ``window`` chunks are in flight, so a long stream of chunks never piles up
    in memory.  With ``client=None`` the chunks are computed here, by the same
    function.
    """
    if client is None:
        for chunk in chunks:
            yield fn(shared, *chunk)
        return
    if not isinstance(shared, _dask().Future):  # already on the cluster otherwise
        shared = put(client, shared)
    pending = []
    for chunk in chunks:
        pending.append(client.submit(_apply, fn, shared, chunk, pure=False, retries=_RETRIES))
        if len(pending) >= window:
            yield pending.pop(0).result()
    for future in pending:
        yield future.result()
