"""Tests of trace fitting, per-exposure refinement and scan bands (lightledger.pipeline.trace)."""

import numpy as np
import pytest
from photutils.centroids import centroid_com
from scipy.special import erf

from lightledger.pipeline.errors import AllMaskedError, ParameterError
from lightledger.pipeline.trace import (ScanBand, Trace, TraceOffsets, column_centroids,
                                        fit_trace, refine, scan_band)


def gaussian_rows(ny, centre, sigma):
    """Pixel-integrated Gaussian along rows; centre of shape (..., nx) -> (..., ny, nx)."""
    y = np.arange(ny)[:, None]
    c = np.asarray(centre, dtype=float)[..., None, :]
    return 0.5 * (erf((y + 0.5 - c) / (np.sqrt(2) * sigma)) - erf((y - 0.5 - c) / (np.sqrt(2) * sigma)))


def band_rows(ny, lo, hi, psf_sigma=None):
    """Fraction of each row covered by a uniform band [lo, hi], optionally blurred by a Gaussian."""
    y = np.arange(ny)[None, :]
    lo = np.asarray(lo, float)[:, None]
    hi = np.asarray(hi, float)[:, None]
    if psf_sigma is None:
        return np.clip(np.minimum(y + 0.5, hi) - np.maximum(y - 0.5, lo), 0.0, None)

    def cdf_int(t):   # integral of the Gaussian CDF
        z = t / (np.sqrt(2) * psf_sigma)
        return t * 0.5 * (1 + erf(z)) + psf_sigma / np.sqrt(2 * np.pi) * np.exp(-z ** 2)

    def F(t):         # integral over rows below t of the blurred band
        return cdf_int(t - lo) - cdf_int(t - hi)

    return F(y + 0.5) - F(y - 0.5)


NX = 160
X = np.arange(NX)
SPEC = 3000.0 * (1 + 0.2 * np.cos(X / 15.0))


def test_column_centroids_match_photutils_centroid_com():
    # Reference library: photutils.centroids.centroid_com of each column
    # (window wider than the column, so the windowed moment is the plain one).
    rng = np.random.default_rng(0)
    frame = gaussian_rows(20, np.full(12, 8.7), 1.4) * 1000 + rng.uniform(0, 5, (20, 12))
    cen, sig, tot = column_centroids(frame, half_window=50.0)
    ref = [centroid_com(frame[:, [k]])[1] for k in range(12)]
    np.testing.assert_allclose(cen, ref, rtol=0, atol=1e-10)
    np.testing.assert_allclose(tot, frame.sum(axis=0), rtol=1e-12)


def test_windowed_centroid_unbiased_off_window():
    # Defining property: for a symmetric profile the re-centred window gives
    # the true centre for any sub-pixel phase (within 2e-3 rows, noiseless;
    # the residual comes from sampling the window edges in whole pixels).
    centres = np.linspace(6.0, 7.0, 11)
    frame = gaussian_rows(16, centres, 1.2) * 1000.0
    cen, sig, _ = column_centroids(frame, half_window=4.0)
    np.testing.assert_allclose(cen, centres, atol=2e-3)
    # Sheppard's correction: sigma of the binned Gaussian within 2 %
    np.testing.assert_allclose(sig, 1.2, rtol=0.02)


def test_fit_trace_recovers_position_tilt_width():
    # Injection-recovery on a noisy median frame (tolerances from the photon
    # noise: about 0.01 rows of centroid error per column).
    rng = np.random.default_rng(1)
    ny = 30
    yc = 12.3 + 0.02 * (X - 80.0)
    frame = gaussian_rows(ny, yc, 1.3) * SPEC
    frame = frame + rng.normal(size=frame.shape) * np.sqrt(frame + 25.0)
    frame[5, 40] = 1e6                                   # a hot pixel away from the trace
    mask = np.zeros(frame.shape, bool)
    mask[5, 40] = True
    tr = fit_trace(frame, mask, order=1, x_ref=80.0)
    assert isinstance(tr, Trace)
    assert abs(tr.coefficients[0] - 12.3) < 0.01
    assert abs(tr.tilt - 0.02) < 2e-4
    assert abs(tr.width / 1.3 - 1) < 0.03
    # pixel r spans [r - 0.5, r + 0.5]: the aperture holds the trace +- 4 sigma
    assert tr.row_lo - 0.5 <= yc.min() - 4 * tr.width < tr.row_lo + 0.5
    assert tr.row_hi - 0.5 >= yc.max() + 4 * tr.width > tr.row_hi - 1.5
    np.testing.assert_allclose(tr.rows(X), yc, atol=0.02)
    quad = fit_trace(frame, mask, order=2, x_ref=80.0)
    assert abs(quad.coefficients[2]) < 1e-5


def test_refine_recovers_sub_pixel_offsets():
    # Brief's requirement: injected sub-pixel y shifts recovered within
    # 0.02 pixel rms; the pull (error / reported sigma) has about unit scatter.
    rng = np.random.default_rng(2)
    ny, n_exp = 30, 40
    yc = 12.3 + 0.02 * (X - 80.0)
    tr = fit_trace(gaussian_rows(ny, yc, 1.3) * SPEC, order=1, x_ref=80.0)
    dys = rng.uniform(-1.5, 1.5, n_exp)
    cube = gaussian_rows(ny, yc[None, :] + dys[:, None], 1.3) * SPEC
    cube = cube + rng.normal(size=cube.shape) * np.sqrt(cube + 25.0)
    off = refine(tr, cube)
    assert isinstance(off, TraceOffsets)
    err = off.offset - dys
    assert np.sqrt(np.mean(err ** 2)) < 0.02
    pull = np.std(err / off.offset_error)
    assert 0.6 < pull < 1.6, pull
    np.testing.assert_allclose(off.width, 1.3, rtol=0.03)
    assert np.all(off.row_hi - off.row_lo >= 8)


@pytest.mark.parametrize("psf", [None, 1.0])
def test_scan_band_edges(psf):
    # Exact for a uniform band with sharp edges and for edges blurred by a
    # symmetric PSF (derivation in scan_band's Notes): 1e-6 rows noiseless for
    # sharp edges, 1e-4 rows when blurred (PSF tails beyond the margin rows).
    ny = 40
    lo = np.array([8.2, 8.7, 9.05, 10.5])
    hi = lo + np.array([15.3, 15.1, 14.9, 15.0])
    rows = band_rows(ny, lo, hi, psf)
    cube = rows[:, :, None] * np.full(NX, 250.0)
    band = scan_band(cube)
    assert isinstance(band, ScanBand)
    tol = 1e-6 if psf is None else 1e-4
    np.testing.assert_allclose(band.row_lo, lo, atol=tol)
    np.testing.assert_allclose(band.row_hi, hi, atol=tol)
    np.testing.assert_allclose(band.length, hi - lo, atol=tol)
    np.testing.assert_allclose(band.level, 250.0, rtol=1e-6)


def test_inputs_not_mutated_and_errors():
    # photutils' test_input_data_not_mutated practice; error contract of STYLE.md
    rng = np.random.default_rng(3)
    cube = gaussian_rows(20, np.full((2, NX), 9.0), 1.2) * SPEC + rng.normal(size=(2, 20, NX))
    mask = rng.random(cube.shape) < 0.01
    copies = cube.copy(), mask.copy()
    tr = fit_trace(cube[0], mask[0])
    refine(tr, cube, mask)
    scan_band(cube, mask)
    column_centroids(cube, mask)
    assert np.array_equal(cube, copies[0]) and np.array_equal(mask, copies[1])
    with pytest.raises(AllMaskedError):
        fit_trace(cube[0], np.ones(cube[0].shape, bool))
    with pytest.raises(ParameterError, match="order"):
        fit_trace(cube[0], order=-1)
    with pytest.raises(ParameterError, match="half_window"):
        column_centroids(cube, half_window=0.1)
    with pytest.raises(ParameterError, match="level"):
        scan_band(cube, level=1.5)
