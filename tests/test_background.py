"""Tests of lightledger.pipeline.background (sky background and its error)."""

import numpy as np
import pytest
from astropy.stats import sigma_clipped_stats

from lightledger.pipeline import mask as dq
from lightledger.pipeline.background import (clipped_mean, detect_source_mask, estimate_background,
                                             source_mask_from_rows)
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
