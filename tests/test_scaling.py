"""Small pieces that keep a long visit cheap: automatic chunk sizes and decimated figures.

Checks are against their definitions (common practice: a mean of groups of
rows; a partition of the exposures into consecutive chunks).
"""

import numpy as np

from lightledger.tasks.base import AUTO_CHUNK, chunk_length, chunk_ranges
from lightledger.tasks.figures import decimate_rows


def test_automatic_chunks_partition_the_visit():
    lo, hi = AUTO_CHUNK
    for n in (1, 5, 60, 150, 1000, 10000):
        ranges = chunk_ranges(n, 0)
        assert ranges[0][0] == 0 and ranges[-1][1] == n
        assert all(a[1] == b[0] for a, b in zip(ranges, ranges[1:]))
        size = chunk_length(n, 0)
        assert lo <= size <= hi
        # a quarter of the visit while that lies within the bounds: two workers stay busy
        if lo * 4 <= n <= hi * 4:
            assert len(ranges) == 4
    # the same chunk (and so the same memory) for every long visit
    assert chunk_length(1000, 0) == chunk_length(10000, 0) == hi
    assert chunk_ranges(10, 4) == [(0, 4), (4, 8), (8, 10)]


def test_decimated_rows_are_group_means():
    a = np.arange(2 * 1300, dtype=float).reshape(1300, 2)
    a[5, 1] = np.nan
    d, step = decimate_rows(a, max_rows=600)
    assert step == 3 and len(d) == 434 <= 600
    np.testing.assert_allclose(d[0], a[:3].mean(axis=0))
    np.testing.assert_allclose(d[1], [a[3:6, 0].mean(), a[3:5, 1].mean()])   # NaN ignored
    np.testing.assert_allclose(d[-1], a[1299])                                # the remainder
    small, step = decimate_rows(a[:10], max_rows=600)
    assert step == 1 and small is not None and np.array_equal(small, a[:10], equal_nan=True)
