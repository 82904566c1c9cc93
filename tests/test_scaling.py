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


def test_binning_in_blocks_equals_binning_the_visit(monkeypatch):
    # bin_spectra treats each exposure on its own (Carnall 2017 overlap weights): blocks of
    # exposures give the same light curves up to the rounding of the matrix products
    import warnings

    from lightledger.pipeline.binning import bin_spectra
    from lightledger.tasks import lightcurves as lcs

    rng = np.random.default_rng(4)
    n, nx = 50, 40
    flux = rng.normal(1e4, 100, (n, nx)).astype(np.float32)
    var = np.full((n, nx), 1e4, np.float32)
    mask = rng.uniform(size=(n, nx)) < 0.05
    mask[:, 7] = True                                    # a pixel bad in every exposure
    good = ~mask
    pix = np.linspace(1.0, 1.4, nx + 1)
    edges = np.array([1.05, 1.15, 1.25, 1.35])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        want_med = np.nanmedian(np.where(good, flux.astype(float), np.nan), axis=0)
    monkeypatch.setattr(lcs, "BLOCK_ROWS", 16)
    med = lcs._median_over_exposures(flux, good, columns=6)
    np.testing.assert_array_equal(med, want_med)
    scale = rng.uniform(0.9, 1.1, n)
    spec = lcs._bridge(med)
    whole = bin_spectra(pix, flux.astype(float), var.astype(float), mask, edges,
                        fill=spec[None] * scale[:, None], fill_variance=spec[None] * scale[:, None])
    blocks = lcs._bin_in_blocks(pix, flux, var, mask, edges, scale, spec, spec)
    np.testing.assert_allclose(blocks.flux, whole.flux, rtol=1e-14)
    np.testing.assert_allclose(blocks.variance, whole.variance, rtol=1e-14)
    np.testing.assert_array_equal(blocks.mask, whole.mask)
    np.testing.assert_array_equal(blocks.n_filled, whole.n_filled)
