"""How the cluster engine cuts the rating matrix into blocks (no cluster needed)."""
import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from hybrid.engines.cluster import _bounds


@given(st.lists(st.integers(0, 50), min_size=1, max_size=60), st.integers(1, 12))
@settings(max_examples=200, deadline=None)
def test_blocks_cover_the_rows_with_balanced_ratings(counts, partitions):
    counts = np.array(counts)
    blocks = _bounds(counts, partitions)
    assert blocks[0][0] == 0 and blocks[-1][1] == len(counts) and len(blocks) <= partitions
    assert all(hi > lo for lo, hi in blocks) and all(a[1] == b[0] for a, b in zip(blocks, blocks[1:]))
    most = max(counts[lo:hi].sum() for lo, hi in blocks)
    assert most <= counts.sum() / partitions + counts.max()
