"""The compiled kernels at the edges of their sizes, compiled with bounds checking on.

numba compiles without bounds checks; with ``NUMBA_BOUNDSCHECK=1`` (numba's documented
switch) every index is checked and an out-of-bounds access raises instead of writing
outside an array.  A child process compiles the kernels that way (its own cache folder,
so no unchecked build is reused), runs edge sizes and compares each answer with numpy.
"""
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from hybrid.core.blocks import design, solve_rows
from hybrid.core.posterior import _full_pool

EDGES = textwrap.dedent('''
    import numpy as np
    import scipy.sparse as sp
    from hybrid.core.blocks import design, solve_rows, sse_rows
    from hybrid.core.posterior import _full_pool
    rng = np.random.default_rng(0)
    cases = 0
    # row solver: an empty row, a row with one rating, every row rated, d = 1 and d = 5, 1 or 2 threads
    for n_rows, n_other, d, density in ((1, 1, 1, 1.0), (3, 2, 1, 0.5), (7, 9, 5, 0.3), (40, 3, 4, 0.9)):
        R = sp.random(n_rows, n_other, density=density, random_state=1, format="csr")
        R.data = rng.normal(size=R.nnz)
        other = rng.normal(size=(n_other, d - 1))
        F = design(other, np.zeros(n_other))
        P = np.eye(d) * 2.0
        for jobs in (1, 2):
            z, edf, _ = solve_rows(R.indptr, R.indices, R.data, F, np.zeros(n_other), P, n_jobs=jobs,
                                   with_edf=True)
            for r in range(n_rows):   # numpy.linalg.solve of each row's ridge normal equations
                cols = R.indices[R.indptr[r]:R.indptr[r + 1]]
                X = F[cols]
                want = np.linalg.solve(X.T @ X + P, X.T @ R.data[R.indptr[r]:R.indptr[r + 1]])
                assert np.allclose(z[r], want), (n_rows, r)
            cases += 1
    # top-k fold: k = 1 and k = pool - 1, one draw and many, the excluded item first and last
    for n_pool, k, n_draws in ((2, 1, 1), (5, 4, 3), (300, 1, 70), (300, 299, 2), (1000, 10, 130)):
        pool = rng.normal(size=(n_pool, 3))
        X = rng.normal(size=(n_draws, 3))
        exclude = rng.integers(0, n_pool, n_draws)
        exclude[0] = n_pool - 1
        D = ((X[:, None, :] - pool[None]) ** 2).sum(-1)
        D[np.arange(n_draws), exclude] = np.inf
        listed = np.argsort(D, axis=1, kind="stable")[:, :k]
        got = _full_pool(X, pool, (pool ** 2).sum(1), listed, exclude, k, n_jobs=2)
        assert np.all(got > 0.99), (n_pool, k, got.min())   # its own list comes back (ties aside)
        cases += 1
    # residual sums: an empty matrix, one rating, with and without the bias layout, against numpy
    for n_rows, n_other, d, density, biases in ((1, 1, 1, 0.0, True), (1, 1, 2, 1.0, True),
                                                (30, 20, 4, 0.3, False), (30, 20, 4, 0.3, True)):
        R = sp.random(n_rows, n_other, density=density, random_state=2, format="csr")
        a, b = rng.normal(size=(n_rows, d)), rng.normal(size=(n_other, d))
        pred = a[:, 1:] @ b[:, 1:].T + a[:, :1] + b[:, 0][None] if biases else a @ b.T
        rows, cols = R.nonzero()
        want = float(((R.toarray() - pred)[rows, cols] ** 2).sum())
        assert np.isclose(sse_rows(R.indptr, R.indices, R.data, a, b, biases), want), (n_rows, d, biases)
        cases += 1
    print("cases", cases)
''')


def test_kernels_at_edge_sizes_with_bounds_checking(tmp_path):
    env = {**os.environ, "NUMBA_BOUNDSCHECK": "1", "NUMBA_CACHE_DIR": str(tmp_path)}
    done = subprocess.run([sys.executable, "-c", EDGES], capture_output=True, text=True, env=env, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.split()[-1] == "17", done.stdout


def test_solve_rows_refuses_sizes_that_would_leave_its_arrays():
    F = design(np.zeros((2, 1)), np.zeros(2))
    P = np.eye(2)
    indptr, indices, values = np.array([0, 1]), np.array([5]), np.array([1.0])
    with pytest.raises(ValueError, match="an index points outside"):
        solve_rows(indptr, indices, values, F, np.zeros(2), P)
    with pytest.raises(ValueError, match="indptr must span"):
        solve_rows(np.array([0, 2]), np.array([0]), np.array([1.0]), F, np.zeros(2), P)
    with pytest.raises(ValueError, match="P must be 2 x 2"):
        solve_rows(np.array([0, 1]), np.array([0]), np.array([1.0]), F, np.zeros(2), np.eye(3))


def test_full_pool_refuses_k_outside_the_pool():
    pool = np.zeros((4, 2))
    for k in (0, 4):
        with pytest.raises(ValueError, match=f"k={k}"):
            _full_pool(np.zeros((1, 2)), pool, np.zeros(4), np.zeros((1, k), int), np.zeros(1, int), k)
