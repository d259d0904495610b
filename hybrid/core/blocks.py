"""The block solver: one half-step for a block of rows of the rating matrix.

Each row (a user, or an item) solves a small ridge problem

    minimise  sum_c (y_rc - f_c . z_r)^2 + w_r (z_r - m_r)^T P (z_r - m_r)

where ``f_c = [1, factors_c]`` are the fixed other side's rows, ``y_rc`` the
rating less the global mean and the other side's bias, ``m_r`` the row's
prior mean and ``P`` a shared prior precision.  The closed form is
``(F^T F + w P) z = F^T y + w P m``.

These functions are pure: they take arrays and return arrays, so a block of
rows can be solved on another core, or another machine, unchanged.  The
half-step itself (:func:`solve_rows`) runs a small compiled row solver
(numba): per row one BLAS product for ``F^T F`` and a Cholesky solve, with
no Python per row and the GIL released for threads.  At this size (a 33 x 33
system per row) a LAPACK call costs more in overhead than in arithmetic,
which is why the factorisation is written out here.  The statistics the
planner and the prior need (:func:`row_grams`, :func:`leverage_rows`) group
rows by their number of ratings and pad them to a common length, so the
Gram matrices come from batched BLAS products.
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
import scipy.sparse as sp
from threadpoolctl import ThreadpoolController

_BUDGET = 1 << 21  # floats in one padded gather (row_grams, leverage_rows): bounds memory


_CONTROLLER = []


def blas_threads(limit):
    """A context that holds BLAS to ``limit`` threads (``None``: leave it alone).

    The thread pools are found once per process and reused: finding them anew on
    every call (threadpoolctl's ``threadpool_limits``) cost 4 ms a call once SciPy and
    scikit-learn were loaded, over a second in a default fit's few hundred solves.
    """
    if not _CONTROLLER:
        _CONTROLLER.append(ThreadpoolController())
    return _CONTROLLER[0].limit(limits=limit)


def design(factors: np.ndarray, bias: np.ndarray | None) -> np.ndarray:
    """The other side's rows ``[1, factors]`` (or ``factors`` without biases),
    with one extra zero row that padding points at."""
    n = factors.shape[0]
    cols = [np.ones((n, 1))] if bias is not None else []
    F = np.hstack(cols + [factors]) if cols else factors
    return np.vstack([F, np.zeros((1, F.shape[1]))])


def groups(counts: np.ndarray, width: int, budget: int = _BUDGET):
    """Yield index arrays of rows with similar counts (zero-count rows skipped)."""
    order = np.argsort(counts, kind="stable")
    sorted_counts = counts[order]
    s = int(np.searchsorted(sorted_counts, 1))
    n = len(order)
    while s < n:
        c0 = int(sorted_counts[s])
        cap = int(c0 * 1.25) + 4
        e = int(np.searchsorted(sorted_counts, cap, side="right"))
        longest = int(sorted_counts[e - 1])
        e = min(e, s + max(1, budget // (longest * width)))
        yield order[s:e]
        s = e


def gather(indptr, indices, values, rows, F_ext, y_offset):
    """Padded design ``T`` (g, L, d) and targets ``y`` (g, L) for ``rows``."""
    starts = indptr[rows]
    lens = indptr[rows + 1] - starts
    L = int(lens.max())
    offs = np.arange(L)[None, :]
    mask = offs < lens[:, None]
    pos = np.where(mask, starts[:, None] + offs, 0)
    cols = np.where(mask, indices[pos], F_ext.shape[0] - 1)
    T = F_ext[cols]
    y = np.where(mask, values[pos] - y_offset[np.minimum(cols, len(y_offset) - 1)], 0.0)
    return T, y


def row_grams(indptr, indices, values, F_ext, y_offset, rows=None):
    """Per-row ``F^T F`` (n, d, d) and ``F^T y`` (n, d); zero for unrated rows.

    Examples
    --------
    >>> import scipy.sparse as sp
    >>> R = sp.csr_matrix(np.array([[1.0, 0, 2.0], [0, 0, 0]]))
    >>> F = design(np.eye(3)[:, :1] + 1, None)
    >>> G, h = row_grams(R.indptr, R.indices, R.data, F, np.zeros(3))
    >>> G[:, 0, 0].tolist(), h[:, 0].tolist()
    ([5.0, 0.0], [4.0, 0.0])
    """
    n = len(indptr) - 1
    d = F_ext.shape[1]
    counts = np.diff(indptr)
    G = np.zeros((n, d, d))
    h = np.zeros((n, d))
    for g in groups(counts, d):
        T, y = gather(indptr, indices, values, g, F_ext, y_offset)
        Tt = T.transpose(0, 2, 1)
        G[g] = Tt @ T
        h[g] = (Tt @ y[..., None])[..., 0]
    return G, h


def solve_rows(indptr, indices, values, F_ext, y_offset, P, prior_mean=None, weight=None,
               n_jobs: int = 1, with_edf: bool = False):
    """Solve every row's ridge problem of one half-step.

    Parameters
    ----------
    indptr, indices, values : arrays
        CSR rows of the block: column indices into the other side, and the
        ratings less the global mean.
    F_ext : ndarray (n_other + 1, d)
        The other side's design rows from :func:`design`; in float32 they are
        gathered at half the memory traffic (the products and the solve are
        always double precision).
    y_offset : ndarray (n_other,)
        The other side's biases (zeros without biases).
    P : ndarray (d, d)
        Shared prior precision (``lam * I`` for an isotropic prior).
    prior_mean : ndarray (n_rows, d), optional
        Zero when absent.
    weight : ndarray (n_rows,) or (n_rows, d), optional
        Per-row multiplier of the prior term; ones when absent.  Per
        coordinate (``(n_rows, d)``), row ``r``'s prior precision is
        ``diag(s) P diag(s)`` with ``s = sqrt(weight[r])``: the prior's spread
        along each coordinate divided by ``s``.
    n_jobs : int
        Threads sharing the rows (the compiled row solver releases the GIL).
    with_edf : bool
        Also each row's effective degrees of freedom (costs ``d`` more solves).

    Returns
    -------
    z : ndarray (n_rows, d)
        Unrated rows get their prior mean.
    edf : ndarray (n_rows,)
        Each row's effective degrees of freedom (zeros unless asked).
    sse : float
        Sum of squared residuals of all the block's ratings at the new solution.

    Examples
    --------
    >>> import scipy.sparse as sp
    >>> R = sp.csr_matrix(np.array([[2.0, 2.0]]))
    >>> F = design(np.zeros((2, 0)), np.zeros(2))     # bias only
    >>> z, _, _ = solve_rows(R.indptr, R.indices, R.data, F, np.zeros(2), np.eye(1))
    >>> round(float(z[0, 0]), 6)                      # 4 / (2 + 1)
    1.333333
    """
    # BLAS on one thread throughout: our threads share the rows (idle BLAS threads would
    # spin against them), and the answer does not depend on how many threads there are
    with blas_threads(1):
        n = len(indptr) - 1
        d = F_ext.shape[1]
        P = np.ascontiguousarray(P, float)
        scale, s_stride = prior_scale(weight, n, d)
        if prior_mean is None:   # no pass over an all-zero (n, d) table: one zero row serves all
            z, prior_rhs, stride = np.zeros((n, d)), np.zeros((1, d)), 0
        else:
            z = np.array(prior_mean, float, order="C")   # unrated rows keep their prior mean
            prior_rhs, stride = scale * ((scale * z) @ P.T), 1
        edf, sse = np.zeros(n), np.zeros(n)
        # index arrays as they come (int32 or int64: the kernel is compiled for either)
        data = (np.asarray(indptr), np.asarray(indices), np.asarray(values, float))
        _check_kernel_inputs(*data, F_ext, y_offset, P, z, scale, s_stride, n)
        # a constant first column (the bias's intercept) is implied rather than gathered
        # (exact whenever it applies: an implied 1 equals the stored one)
        n_other = len(F_ext) - 1
        intercept = n_other > 0 and F_ext.shape[1] > 0 and bool(np.all(F_ext[:n_other, 0] == 1.0))
        table = _aligned(F_ext[:, 1:] if intercept else F_ext)
        fixed = (table, intercept, np.ascontiguousarray(y_offset, float), P, prior_rhs, stride, scale,
                 s_stride, with_edf, z, edf, sse)
        shares = _shares(np.diff(data[0]), max(1, int(n_jobs)))
        if len(shares) > 1:
            with ThreadPoolExecutor(len(shares)) as pool:
                list(pool.map(lambda rows: _solve_kernel(*data, rows, *fixed), shares))
        else:
            _solve_kernel(*data, shares[0], *fixed)
    return z, edf, float(sse.sum())


def _check_kernel_inputs(indptr, indices, values, F_ext, y_offset, P, z, scale, s_stride, n):
    """Refuse sizes that would drive the compiled kernel, which indexes without bounds checks,
    outside its arrays (a ``ValueError`` naming the mismatch, never a write out of bounds)."""
    d = F_ext.shape[1]
    problems = [
        (indptr.ndim != 1 or len(indptr) != n + 1, "indptr must have one entry per row plus one"),
        (n > 0 and (indptr[0] != 0 or indptr[-1] != len(indices) or len(values) != len(indices)),
         "indptr must span indices and values exactly"),
        (n > 0 and bool(np.any(np.diff(indptr) < 0)), "indptr must not decrease"),
        (len(indices) > 0 and (indices.min() < 0 or indices.max() >= len(F_ext) - 1),
         "an index points outside the other side's rows"),
        (len(indices) > 0 and len(y_offset) < len(F_ext) - 1, "y_offset is shorter than the other side"),
        (P.shape != (d, d), f"P must be {d} x {d}"),
        (z.shape != (n, d), f"prior_mean must be {n} x {d}"),
        (scale.shape[1] != d or (s_stride and len(scale) != n), "weight must have one row per row"),
    ]
    for bad, why in problems:
        if bad:
            raise ValueError(f"solve_rows: {why}")


@numba.njit(nogil=True, cache=True)
def _solve_kernel(indptr, indices, values, rows, table, intercept, y_offset, P, prior_rhs, stride, scale,
                  s_stride, with_edf, z_out, edf_out, sse_out):  # pragma: no cover - compiled
    """Each row of ``rows``: gather its design, ``F^T F`` by one BLAS product, an
    in-place Cholesky factorisation and two triangular solves.  Compiled, with
    the GIL released, so threads can share the rows; ``prior_rhs[stride * r]``
    is row ``r``'s ``S P S m`` and ``scale[s_stride * r]`` its ``diag(S)``.  The
    design rows are ``[1, table[c]]`` with ``intercept`` (the constant column is
    not stored: fewer cache lines per gathered row)."""
    off = 1 if intercept else 0
    d = table.shape[1] + off
    for r in rows:
        s, e = indptr[r], indptr[r + 1]
        T = np.empty((e - s, d))
        y = np.empty(e - s)
        b = prior_rhs[stride * r].copy()
        for j in range(e - s):
            c = indices[s + j]
            y[j] = values[s + j] - y_offset[c]
            if intercept:
                T[j, 0] = 1.0
                b[0] += y[j]
            for a in range(off, d):
                T[j, a] = table[c, a - off]
                b[a] += y[j] * T[j, a]
        A = T.T @ T
        sc = scale[s_stride * r]
        for a in range(d):
            for c in range(d):
                A[a, c] += sc[a] * P[a, c] * sc[c]
        _cholesky(A)
        z = _cho_solve(A, b)
        sse = 0.0
        for j in range(e - s):
            fit = 0.0
            for a in range(d):
                fit += T[j, a] * z[a]
            sse += (y[j] - fit) ** 2
        sse_out[r] = sse
        z_out[r] = z
        if with_edf:  # trace(F^T F A^-1) = d - trace(S P S A^-1): the ridge fit's degrees of freedom
            tr = 0.0
            for j in range(d):
                tr += _cho_solve(A, sc * P[:, j] * sc[j])[j]
            edf_out[r] = d - tr


@numba.njit(nogil=True, cache=True)
def _cholesky(A):  # pragma: no cover - compiled
    """In place: the lower triangle of ``A`` becomes ``L`` with ``A = L L^T``."""
    d = A.shape[0]
    for k in range(d):
        v = A[k, k]
        for t in range(k):
            v -= A[k, t] * A[k, t]
        v = np.sqrt(v)
        A[k, k] = v
        for i in range(k + 1, d):
            x = A[i, k]
            for t in range(k):
                x -= A[i, t] * A[k, t]
            A[i, k] = x / v


@numba.njit(nogil=True, cache=True)
def _cho_solve(L, b):  # pragma: no cover - compiled
    """``(L L^T)^-1 b`` for the factor from :func:`_cholesky` (``b`` is overwritten)."""
    d = L.shape[0]
    for k in range(d):
        x = b[k]
        for t in range(k):
            x -= L[k, t] * b[t]
        b[k] = x / L[k, k]
    for k in range(d - 1, -1, -1):
        x = b[k]
        for t in range(k + 1, d):
            x -= L[t, k] * b[t]
        b[k] = x / L[k, k]
    return b


def prior_scale(weight, n, d):
    """``(scale, stride)``: the square roots of per-row (or per-row, per-coordinate)
    prior weights as an ``(n, d)`` table, or one row of ones (stride 0) when absent."""
    if weight is None:
        return np.ones((1, d)), 0
    w = np.asarray(weight, float)
    w = np.broadcast_to(w[:, None] if w.ndim == 1 else w, (n, d))
    return np.ascontiguousarray(np.sqrt(w)), 1


def _aligned(a):
    """A C-ordered copy of ``a`` (float32 kept, else float64) starting on a 64-byte
    boundary, so that a row of 32 values spans whole cache lines."""
    dtype = np.float32 if a.dtype == np.float32 else np.float64
    size = np.dtype(dtype).itemsize
    raw = np.empty(a.size + 64 // size, dtype)
    start = (-raw.ctypes.data % 64) // size
    out = raw[start:start + a.size].reshape(a.shape)
    out[...] = a
    return out


def _shares(counts, n_jobs):
    """The rated rows dealt into ``n_jobs`` lists of about equal work (largest first)."""
    order = np.argsort(-counts, kind="stable")
    order = order[counts[order] > 0]
    return [order[j::n_jobs] for j in range(n_jobs)]


def sse_rows(indptr, indices, values, rows_z, other_z, biases):
    """Sum of squared residuals of a block of rows: ``rows_z`` (n_rows, d) are the
    rows' own blocks, ``other_z`` the other side's, ``values`` ratings less the mean.

    >>> import scipy.sparse as sp
    >>> R = sp.csr_matrix(np.array([[1.0, 0.0, 3.0]]))
    >>> sse_rows(R.indptr, R.indices, R.data, np.array([[0.0, 1.0]]), np.zeros((3, 2)), True)
    10.0
    """
    # a compiled pass: the numpy version gathered both sides' blocks for every rating
    # (two 1M x 33 tables at a million ratings) and took seconds for a milliseconds job
    indptr, indices = np.asarray(indptr, np.int64), np.asarray(indices, np.int64)
    rows_z, other_z = np.ascontiguousarray(rows_z, float), np.ascontiguousarray(other_z, float)
    n = len(indptr) - 1
    if n > len(rows_z) or len(indices) != len(values) or indptr[-1] > len(values) or \
            rows_z.shape[1] != other_z.shape[1] or (len(indices) and not 0 <= indices.min() <= indices.max() < len(other_z)):
        raise ValueError(f"sse_rows: {n} rows, {len(values)} ratings, blocks {rows_z.shape} and {other_z.shape}")
    return float(_sse_kernel(indptr, indices, np.asarray(values, float), rows_z, other_z, bool(biases)))


@numba.njit(nogil=True, cache=True)
def _sse_kernel(indptr, indices, values, rows_z, other_z, biases):  # pragma: no cover - compiled
    total = 0.0
    d = rows_z.shape[1]
    first = 1 if biases else 0
    for row in range(len(indptr) - 1):
        for e in range(indptr[row], indptr[row + 1]):
            c = indices[e]
            pred = rows_z[row, 0] + other_z[c, 0] if biases else 0.0
            for k in range(first, d):
                pred += rows_z[row, k] * other_z[c, k]
            diff = values[e] - pred
            total += diff * diff
    return total


def rater_sums(indptr, indices, values, others):
    """Per row, the sum of its raters' rows of ``others`` and the sum of its ``values``.

    ``others`` (n_other, d) are the other side's blocks; a rating's entry counts once
    whatever its value (a rating equal to the mean is a stored zero and still a rater).

    >>> import scipy.sparse as sp
    >>> R = sp.csr_matrix(([0.5, -1.0, 2.0], [0, 2, 1], [0, 2, 3]), shape=(2, 3))
    >>> sums, own = rater_sums(R.indptr, R.indices, R.data, np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]]))
    >>> sums.tolist(), own.tolist()          # row 0: users 0 and 2; row 1: user 1
    ([[6.0, 8.0], [3.0, 4.0]], [-0.5, 2.0])
    """
    n = len(indptr) - 1
    pattern = sp.csr_matrix((np.ones(len(indices)), np.asarray(indices), np.asarray(indptr)),
                            shape=(n, len(others)))
    rows = np.repeat(np.arange(n), np.diff(indptr))
    return np.asarray(pattern @ others), np.bincount(rows, weights=np.asarray(values, float), minlength=n)


def leverage_rows(indptr, indices, values, F_ext, y_offset, lam, members):
    """``(sum of 1 / (1 - h), count)`` over a block's ratings whose column is in
    ``members``, ``h`` each rating's leverage in its row's ridge fit (capped at 0.9)."""
    d = F_ext.shape[1]
    total, count = 0.0, 0
    for g in groups(np.diff(indptr), d):
        T, _ = gather(indptr, indices, values, g, F_ext, y_offset)
        H = np.linalg.inv(T.transpose(0, 2, 1) @ T + lam * np.eye(d))
        h = np.sum((T @ H.astype(T.dtype)) * T, axis=2)
        lens = indptr[g + 1] - indptr[g]
        pos = np.minimum(indptr[g][:, None] + np.arange(T.shape[1])[None, :], len(indices) - 1)
        keep = (np.arange(T.shape[1])[None, :] < lens[:, None]) & members[indices[pos]]
        total += float(np.sum(1.0 / (1.0 - np.minimum(h[keep], 0.9))))
        count += int(keep.sum())
    return total, count

