"""Tests of lightledger.pipeline.background (sky background and its error)."""

import numpy as np
import pytest
from astropy.stats import sigma_clipped_stats

from lightledger.pipeline import mask as dq
from lightledger.pipeline.background import (TraceMask, clipped_mean, detect_source_mask,
                                             estimate_background, source_mask_from_rows,
                                             trace_source_mask)
from lightledger.pipeline.errors import AllMaskedError, ParameterError

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
        assert est.bits[10, 20] & dq.BACKGROUND_OUTLIER
        assert not np.any(est.bits[src] & dq.BACKGROUND_OUTLIER)
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
