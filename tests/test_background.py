"""Tests of lightledger.pipeline.background (sky background and its error)."""

import numpy as np
import pytest
from astropy.stats import sigma_clipped_stats
from hypothesis import given, settings, strategies as st
from hypothesis.extra import numpy as hnp

from lightledger.pipeline import background as bg
from lightledger.pipeline import mask as dq
from lightledger.pipeline.background import (TraceMask, clipped_mean, detect_source_mask,
                                             estimate_background, source_mask_from_rows,
                                             trace_source_mask)
from lightledger.pipeline.errors import AllMaskedError, ParameterError
from lightledger.pipeline.ramps import masked_median

NY, NX = 100, 180


def frame(rng, sky, sigma=20.0, trace_rows=(45, 55), peak=5000.0):
    """Sky (per column) + Gaussian noise + a bright trace along x."""
    y = np.arange(NY)[:, None]
    img = np.broadcast_to(sky, (NY, NX)) + rng.normal(0.0, sigma, (NY, NX))
    img = img + peak * np.exp(-0.5 * ((y - 50.0) / 1.5) ** 2)
    return img


@pytest.mark.parametrize("method", ["rowcol", "2d"])
def test_background_recovered_within_stated_error(method):
    rng = np.random.default_rng(50)
    x = np.arange(NX)
    # smooth along the dispersion: a gentle slope (the methods' statistical error does not
    # include model error from structure on the scale of a mesh or of the boxcar)
    sky = 140.0 + 10.0 * x / NX
    src = source_mask_from_rows((NY, NX), (45, 55), pad=3)
    pulls = []
    for _ in range(8):
        est = estimate_background(frame(rng, sky), source_mask=src, method=method)
        truth = np.broadcast_to(sky, (NY, NX))
        pulls.append(((est.background - truth) / np.sqrt(est.variance))[::10, ::15])
    p = np.concatenate(pulls).ravel()
    print(f"{method}: background pull mean {p.mean():+.3f} std {p.std():.3f}")
    # within the stated error: mean pull ~0, scatter about 1 (Monte Carlo over 8 frames)
    assert abs(p.mean()) < 0.3
    assert p.std() < 1.3
    if method == "rowcol":
        assert p.std() > 0.7  # the rowcol error is not grossly overstated either
    assert est.level == pytest.approx(np.median(sky), abs=5 * np.sqrt(np.median(est.variance)))


def test_clipped_pixels_flagged_and_sources_not():
    rng = np.random.default_rng(51)
    img = frame(rng, 100.0)
    img[10, 20] += 3000.0  # hot pixel away from the trace
    src = source_mask_from_rows((NY, NX), (45, 55), pad=3)
    for method in ("rowcol", "2d"):
        est = estimate_background(img, source_mask=src, method=method, detect=False)
        assert est.bits[10, 20] & dq.SKY_CLIPPED
        assert not np.any(est.bits[src] & dq.SKY_CLIPPED)
        # 3-sigma clipping of Gaussian noise rejects ~0.3% (common practice); allow 1%
        assert np.mean(est.bits[~src] != 0) < 0.01


def test_clipped_mean_matches_astropy_sigma_clipped_stats():
    rng = np.random.default_rng(52)
    x = rng.normal(10.0, 2.0, (200, 6))
    x[::17] += 40.0
    mean, var_mean, kept = clipped_mean(x, np.zeros(x.shape, bool), axis=0, sigma=3.0, maxiters=10)
    # reference library: astropy sigma_clipped_stats with median centre and MAD-based std
    ref_mean, _, _ = sigma_clipped_stats(x, axis=0, sigma=3.0, maxiters=10, cenfunc="median",
                                         stdfunc="mad_std")
    np.testing.assert_allclose(mean, ref_mean, rtol=1e-10)
    assert np.all(np.isfinite(var_mean))


def clipped_mean_loop(data, mask, axis=0, sigma=3.0, maxiters=5):
    """Slow obvious reference of clipped_mean: one line at a time, np.median of the kept values."""
    x = np.moveaxis(np.asarray(data, dtype=float), axis, -1)
    m = np.moveaxis(np.asarray(mask, dtype=bool), axis, -1)
    mean = np.full(x.shape[:-1], np.nan)
    var_mean = np.full(x.shape[:-1], np.nan)
    kept = np.zeros(x.shape, bool)
    for idx in np.ndindex(*x.shape[:-1]):
        v = x[idx]
        keep = ~m[idx] & np.isfinite(v)
        for _ in range(maxiters):
            if not keep.any():
                break
            med = np.median(v[keep])
            mad = np.median(np.abs(v[keep] - med))
            new = keep & ~(np.abs(v - med) > sigma * (1.4826 * mad))
            if np.array_equal(new, keep):
                break
            keep = new
        kept[idx] = keep
        if keep.sum() >= 1:
            mean[idx] = v[keep].mean()
        if keep.sum() >= 2:
            var_mean[idx] = v[keep].var(ddof=1) / keep.sum()
    return mean, var_mean, np.moveaxis(kept, -1, axis)


def clipped_mean_two_sorts(data, mask, axis=0, sigma=3.0, maxiters=5):
    """The direct vectorised method: two masked medians (two sorts) per clipping pass."""
    x = np.asarray(data, dtype=float)
    keep = ~(np.asarray(mask, dtype=bool) | ~np.isfinite(x))
    for _ in range(int(maxiters)):
        med, n = masked_median(x, ~keep, axis=axis)
        medx = np.expand_dims(med, axis)
        mad, _ = masked_median(np.abs(x - medx), ~keep, axis=axis)
        scale = np.expand_dims(1.4826 * mad, axis)
        with np.errstate(invalid="ignore"):
            new = keep & ~(np.abs(x - medx) > sigma * scale)
        if np.array_equal(new, keep):
            break
        keep = new
    n = keep.sum(axis=axis)
    xs = np.where(keep, x, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = xs.sum(axis=axis) / n
        dev = np.where(keep, x - np.expand_dims(mean, axis), 0.0)
        var = (dev ** 2).sum(axis=axis) / (n - 1)
        var_mean = np.where(n >= 2, var / n, np.nan)
    return np.where(n > 0, mean, np.nan), var_mean, keep


def awkward_sample(rng, shape, axis, n_empty=3):
    """Values with ties, outliers, NaN and inf, a mask, and ``n_empty`` lines along ``axis``
    left with 0-2 usable values."""
    kind = rng.integers(3)
    if kind == 0:
        x = rng.normal(100.0, 5.0, shape)
    elif kind == 1:
        x = rng.integers(0, 6, shape).astype(float)  # many ties, often MAD = 0
    else:
        x = np.round(rng.standard_t(2.0, shape) * 10.0)  # heavy tails and ties
    hit = rng.random(shape) < 0.08
    x[hit] += rng.choice([-1.0, 1.0], hit.sum()) * rng.uniform(30.0, 3000.0, hit.sum())
    x[rng.random(shape) < 0.03] = np.nan
    x[rng.random(shape) < 0.01] = np.inf
    mask = rng.random(shape) < rng.uniform(0.0, 0.5)
    others = [n for k, n in enumerate(shape) if k != axis]
    n_lines = int(np.prod(others, dtype=int))
    for k in rng.choice(n_lines, size=min(n_empty, n_lines), replace=False):
        where = [int(i) for i in np.unravel_index(k, others)] if others else []
        where.insert(axis, slice(None))
        line = mask[tuple(where)]  # a view
        line[:] = True
        line[:rng.integers(0, 3)] = False
    return x, mask


def assert_same_clip(got, ref):
    # mean and variance to float rounding; the kept elements exactly
    np.testing.assert_allclose(got[0], ref[0], rtol=1e-12, atol=0)
    np.testing.assert_allclose(got[1], ref[1], rtol=1e-12, atol=0)
    np.testing.assert_array_equal(got[2], ref[2])


@pytest.mark.parametrize("seed", range(40))
def test_clipped_mean_matches_slow_references_on_awkward_data(seed):
    rng = np.random.default_rng(1000 + seed)
    shape = tuple(int(v) for v in rng.integers(1, 40, size=rng.integers(1, 4)))
    axis = int(rng.integers(len(shape)))
    sigma = float(rng.choice([3.0, 2.0, 1.0, 0.5, 0.0, 5.0, -1.0]))
    maxiters = int(rng.choice([0, 1, 3, 5, 10]))
    x, mask = awkward_sample(rng, shape, axis)
    x0, mask0 = x.copy(), mask.copy()
    got = clipped_mean(x, mask, axis=axis, sigma=sigma, maxiters=maxiters)
    np.testing.assert_array_equal(x, x0)  # inputs not modified
    np.testing.assert_array_equal(mask, mask0)
    assert_same_clip(got, clipped_mean_two_sorts(x, mask, axis=axis, sigma=sigma, maxiters=maxiters))
    assert_same_clip(got, clipped_mean_loop(x, mask, axis=axis, sigma=sigma, maxiters=maxiters))


@settings(max_examples=150, deadline=None)
@given(data=hnp.arrays(np.float64, hnp.array_shapes(min_dims=2, max_dims=2, max_side=12),
                       elements=st.sampled_from([0.0, 1.0, 1.5, 2.0, -3.0, 10.0, 1e4, -1e4,
                                                 np.nan, np.inf, -np.inf])),
       seed=st.integers(0, 2 ** 16), sigma=st.sampled_from([3.0, 1.0, 0.3, -1.0]),
       axis=st.sampled_from([0, 1]))
def test_clipped_mean_matches_loop_reference_on_small_cases(data, seed, sigma, axis):
    # few distinct values: ties, MAD = 0, lines of 1 or 2 values, negative sigma
    mask = np.random.default_rng(seed).random(data.shape) < 0.3
    got = clipped_mean(data, mask, axis=axis, sigma=sigma, maxiters=6)
    assert_same_clip(got, clipped_mean_loop(data, mask, axis=axis, sigma=sigma, maxiters=6))


@pytest.mark.parametrize("shape, axis", [((3000,), 0), ((700, 3), 0), ((4, 300), 1)])
def test_clipped_mean_matches_slow_references_on_long_lines(shape, axis):
    # lines longer than 255 values (counts no longer fit in a byte)
    rng = np.random.default_rng(58)
    x, mask = awkward_sample(rng, shape, axis, n_empty=0)
    line = [0] * x.ndim
    line[axis] = slice(None)
    many = x[tuple(line)]  # (view) one line with hundreds of outliers
    many[rng.random(many.size) < 0.4] = 1e5
    for sigma in (3.0, 1.0):
        got = clipped_mean(x, mask, axis=axis, sigma=sigma, maxiters=10)
        assert_same_clip(got, clipped_mean_two_sorts(x, mask, axis=axis, sigma=sigma, maxiters=10))
        assert_same_clip(got, clipped_mean_loop(x, mask, axis=axis, sigma=sigma, maxiters=10))


def test_clipped_mean_all_masked_and_no_iterations():
    x = np.arange(12.0).reshape(4, 3)
    mean, var_mean, kept = clipped_mean(x, np.ones(x.shape, bool))
    assert np.all(np.isnan(mean)) and np.all(np.isnan(var_mean)) and not kept.any()
    # maxiters=0: the plain mean of the usable values (definition)
    x[0, 0] = 1e6
    mean, _, kept = clipped_mean(x, np.zeros(x.shape, bool), maxiters=0)
    np.testing.assert_allclose(mean, x.mean(axis=0), rtol=1e-14)
    assert kept.all()


@pytest.mark.parametrize("row_order", [0, 1])
def test_estimate_background_matches_the_slow_clipped_mean(monkeypatch, row_order):
    # the whole rowcol estimate with the direct two-sort clipping (reference above) in place of
    # the rank-based one: same background, variance, level, flags and count
    rng = np.random.default_rng(57)
    img = frame(rng, 100.0 + 5.0 * np.sin(np.arange(NX) / 20.0))
    img[rng.random(img.shape) < 0.01] += 4000.0
    img[3, 7] = np.nan
    bad = rng.random(img.shape) < 0.05
    bad[:, 100] = True  # a dead column
    src = source_mask_from_rows((NY, NX), (45, 55), pad=3)
    fast = estimate_background(img, mask=bad, source_mask=src, row_order=row_order)

    def slow(x, bad_, axis, sigma, maxiters):
        return clipped_mean_two_sorts(x, bad_, axis=axis, sigma=sigma, maxiters=maxiters)

    monkeypatch.setattr(bg, "_clipped_mean", slow)
    monkeypatch.setattr(bg, "clipped_mean", clipped_mean_two_sorts)
    ref = estimate_background(img, mask=bad, source_mask=src, row_order=row_order)
    np.testing.assert_allclose(fast.background, ref.background, rtol=1e-12)
    np.testing.assert_allclose(fast.variance, ref.variance, rtol=1e-12)
    np.testing.assert_array_equal(fast.bits, ref.bits)
    assert fast.n_used == ref.n_used
    assert fast.level == pytest.approx(ref.level, rel=1e-12)
    # level is the median of the background map (definition in BackgroundEstimate)
    assert fast.level == np.nanmedian(fast.background)


def test_detect_source_mask_covers_trace():
    rng = np.random.default_rng(53)
    m = detect_source_mask(frame(rng, 100.0), dilate_size=5)
    assert m[48:53].all()
    assert not m[:30].any()


def test_errors_and_not_mutated():
    rng = np.random.default_rng(54)
    img = frame(rng, 100.0)
    img0 = img.copy()
    src = source_mask_from_rows((NY, NX), (45, 55))
    estimate_background(img, source_mask=src)
    np.testing.assert_array_equal(img, img0)
    with pytest.raises(ParameterError, match="method"):
        estimate_background(img, method="poly")
    with pytest.raises(AllMaskedError):
        estimate_background(img, source_mask=np.ones(img.shape, bool))


def partial_trace(rng, sigma=20.0, stream_sigma=15.0):
    """Trace over columns 20..159 (smooth ends), sky, white noise and 1/f along the readout."""
    y = np.arange(NY)[:, None]
    x = np.arange(NX)[None, :]
    spectrum = 5000.0 / (1 + np.exp(-(x - 25.0) / 2.0)) / (1 + np.exp((x - 155.0) / 2.0))
    source = spectrum * np.exp(-0.5 * ((y - 50.0) / 1.5) ** 2)
    f = np.fft.rfftfreq(NY * NX)
    amp = np.zeros_like(f)
    amp[1:] = f[1:] ** -0.5  # 1/f noise along the stream (common practice: white noise shaped in Fourier space)
    s = np.fft.irfft(amp * (rng.normal(size=f.size) + 1j * rng.normal(size=f.size)), n=NY * NX)
    stream = (stream_sigma * s / s.std()).reshape(NY, NX)
    return 100.0 + source + rng.normal(0.0, sigma, (NY, NX)) + stream, source


@pytest.mark.parametrize("guess", [None, (44, 56)])
def test_trace_source_mask_covers_the_source_and_leaves_faint_pixels(guess):
    rng = np.random.default_rng(55)
    img, source = partial_trace(rng)
    img[10, 5] += 3000.0  # a cosmic ray in a faint corner
    bad = np.zeros((NY, NX), bool)
    bad[70, 70] = True
    img[70, 70] = 1e6  # a flagged hot pixel: ignored by the detection
    img0 = img.copy()
    tm = trace_source_mask(img, rows=guess, mask=bad)
    np.testing.assert_array_equal(img, img0)
    assert isinstance(tm, TraceMask)
    # everything brighter than 3 sigma of the noise is inside the mask
    assert tm.mask[source > 3 * 20.0].all()
    assert tm.mask[10, 5]
    # the faint ends of the trace rows and the rows away from it stay usable
    assert not tm.mask[44:57, :12].any() and not tm.mask[44:57, 170:].any()
    far = np.abs(np.arange(NY) - 50) > 8
    far[4:17] = False  # the cosmic ray's neighbourhood
    assert not tm.mask[far].any()
    assert not tm.mask[70, 70]
    # robust scatter (1.4826 MAD, common practice) close to the white noise plus the stream's
    assert 20.0 < tm.sigma < 30.0


@pytest.mark.parametrize("seed", [55, 56, 57])
def test_trace_source_mask_grows_into_the_faint_ends(seed):
    # The single-column test (3 sigma) stops where a column still holds a few hundred
    # electrons; with grow_sigma the run extends while a 9-column running mean stays
    # significant (hysteresis thresholding, common practice), so columns holding more than
    # 2 sigma of source (summed over rows) are masked, and it stops where the source has
    # faded to nothing (seeds 55-57: columns 11-12 .. 168-171; without growth 15-16 .. 163-166).
    rng = np.random.default_rng(seed)
    img, source = partial_trace(rng)
    plain = trace_source_mask(img, rows=(44, 56))
    grown = trace_source_mask(img, rows=(44, 56), grow_sigma=2.0)
    column_sum = source.sum(axis=0)
    assert not plain.columns[column_sum > 2 * 20.0].all()       # the test can fail without growth
    assert grown.columns[column_sum > 2 * 20.0].all()
    assert not grown.columns[column_sum < 0.01].any()
    assert (grown.mask >= plain.mask).all()
    with pytest.raises(ParameterError, match="grow_width"):
        trace_source_mask(img, grow_width=0)


def test_trace_source_mask_errors():
    img = np.zeros((NY, NX))
    with pytest.raises(ParameterError, match="mask"):
        trace_source_mask(img, mask=np.zeros((3, 3), bool))
    with pytest.raises(ParameterError, match="row_pad"):
        trace_source_mask(img, row_pad=-1)
    with pytest.raises(AllMaskedError):
        trace_source_mask(img, mask=np.ones((NY, NX), bool))
    # no source: an empty mask
    rng = np.random.default_rng(56)
    assert not trace_source_mask(rng.normal(0.0, 1.0, (NY, NX))).mask.any()
