"""Tests of spectral and spatial drift measurement (lightledger.pipeline.drift)."""

import numpy as np
import pytest
from scipy.special import erf

from lightledger.pipeline.drift import (SpatialShift, SpectralShift, scan_length,
                                        spatial_shift, spectral_shift)
from lightledger.pipeline.errors import AllMaskedError, ParameterError

LINES = [(40, 0.30, 1.5), (90, 0.50, 2.0), (130, 0.25, 1.0), (170, 0.40, 2.5)]  # centre, depth, sigma


def integrated_spectrum(lo, hi, level=1e5):
    """Exact integral over [lo, hi] of a sloped continuum with Gaussian absorption lines."""
    def F(t):
        out = level * (t + 1e-3 * t ** 2)
        for c, d, s in LINES:
            out = out - level * d * s * np.sqrt(np.pi / 2) * erf((t - c) / (np.sqrt(2) * s))
        return out
    return F(hi) - F(lo)


NX = 200
X = np.arange(NX)
REF = integrated_spectrum(X - 0.5, X + 0.5)


def shifted(shifts, rng=None):
    s = integrated_spectrum(X - 0.5 - shifts[:, None], X + 0.5 - shifts[:, None])
    var = s.copy()
    if rng is not None:
        s = s + rng.normal(size=s.shape) * np.sqrt(var)
    return s, var


def slow_ccf(spec, ref, lag):
    """Normalised cross-correlation at one whole-pixel lag, by loop."""
    pairs = [(spec[x], ref[x - lag]) for x in range(len(spec)) if 0 <= x - lag < len(ref)]
    a = np.array([p[0] for p in pairs])
    b = np.array([p[1] for p in pairs])
    a, b = a - a.mean(), b - b.mean()
    return (a * b).sum() / np.sqrt((a * a).sum() * (b * b).sum())


def test_spectral_shift_recovered_with_unit_pulls():
    # Brief's requirement: injected sub-pixel x shifts recovered within
    # 0.02 pixel rms; injection-recovery with a pull check (astropy BLS tests'
    # practice): (recovered - truth) / sigma has unit scatter (0.7-1.4 for
    # 60 draws).
    rng = np.random.default_rng(10)
    truth = rng.uniform(-2.5, 2.5, 60)
    spec, var = shifted(truth, rng)
    fit = spectral_shift(spec, REF, variance=var)
    assert isinstance(fit, SpectralShift) and fit.method == "fit"
    err = fit.shift - truth
    assert np.sqrt(np.mean(err ** 2)) < 0.02
    assert 0.7 < np.std(err / fit.shift_error) < 1.4
    np.testing.assert_allclose(fit.scale, 1.0, rtol=1e-3)
    # the parabola through the cross-correlation peak alone (Deming et al.
    # 2013 discuss its pixel-phase bias): within 0.05 pixel rms here
    xc = spectral_shift(spec, REF, method="xcorr")
    assert np.sqrt(np.mean((xc.shift - truth) ** 2)) < 0.05


def test_shift_and_stretch():
    # Deming et al. 2013 shift-and-stretch: a stretched, shifted spectrum
    # (noiseless, model evaluated exactly) is recovered to 1e-3 pixel / 1e-5.
    b, d, x0 = 2e-3, 0.7, 99.5
    u_lo = x0 + (1 + b) * (X - 0.5 - x0) - d
    u_hi = x0 + (1 + b) * (X + 0.5 - x0) - d
    spec = integrated_spectrum(u_lo, u_hi) / (1 + b)
    fit = spectral_shift(spec[None], REF, fit_stretch=True, x0=x0)
    assert abs(fit.shift[0] - d) < 1e-2
    assert abs(fit.stretch[0] - b) < 1e-4
    no_stretch = spectral_shift(spec[None], REF, x0=x0)
    assert abs(no_stretch.stretch[0]) == 0.0


def test_xcorr_peak_matches_slow_loop():
    # Fast cross-correlation vs a loop over lags (common practice): at an
    # integer shift the peak is that lag, and the parabola uses the same values.
    spec, _ = shifted(np.array([2.0]))
    fit = spectral_shift(spec, REF, method="xcorr", max_shift=4)
    lags = np.arange(-4, 5)
    ccf = np.array([slow_ccf(spec[0], REF, k) for k in lags])
    j = int(np.argmax(ccf))
    expect = lags[j] + 0.5 * (ccf[j - 1] - ccf[j + 1]) / (ccf[j - 1] - 2 * ccf[j] + ccf[j + 1])
    assert abs(fit.shift[0] - expect) < 1e-10
    assert abs(fit.shift[0] - 2.0) < 0.05


def gaussian_rows(ny, centre, sigma):
    y = np.arange(ny)[:, None]
    c = np.asarray(centre, dtype=float)[..., None, :]
    return 0.5 * (erf((y + 0.5 - c) / (np.sqrt(2) * sigma)) - erf((y - 0.5 - c) / (np.sqrt(2) * sigma)))


def test_spatial_shift_and_width():
    # Brief's requirement: injected sub-pixel y shifts within 0.02 pixel rms;
    # width (Sheppard-corrected second moment) within 3 % of the Gaussian sigma.
    rng = np.random.default_rng(4)
    n_exp, ny = 30, 24
    dys = rng.uniform(-1.2, 1.2, n_exp)
    cube = gaussian_rows(ny, np.full((n_exp, NX), 11.4) + dys[:, None], 1.25) * REF[None, None, :] / 50
    cube = cube + rng.normal(size=cube.shape) * np.sqrt(cube + 100.0)
    mask = rng.random(cube.shape) < 0.01
    cube[mask] = 1e7
    sp = spatial_shift(cube, mask, reference=11.4)
    assert isinstance(sp, SpatialShift)
    assert np.sqrt(np.mean((sp.shift - dys) ** 2)) < 0.02
    np.testing.assert_allclose(sp.width, 1.25, rtol=0.03)
    # without the mask the 1e7 hot pixels spoil it: the check can fail
    bad = spatial_shift(cube, reference=11.4)
    assert np.sqrt(np.mean((bad.shift - dys) ** 2)) > 0.05


def test_scan_length():
    # Length of a uniform scanned band with sub-pixel edges (exact, see
    # trace.scan_band Notes).
    y = np.arange(40)[None, :]
    lo = np.array([5.3, 5.9])
    length = np.array([20.25, 19.6])
    rows = np.clip(np.minimum(y + 0.5, (lo + length)[:, None]) - np.maximum(y - 0.5, lo[:, None]), 0, None)
    cube = rows[:, :, None] * np.full(30, 400.0)
    np.testing.assert_allclose(scan_length(cube), length, atol=1e-9)


def test_inputs_not_mutated_and_errors():
    # photutils' test_input_data_not_mutated practice; error contract of STYLE.md
    rng = np.random.default_rng(0)
    spec, var = shifted(np.array([0.3, -0.4]), rng)
    mask = np.zeros(spec.shape, bool)
    mask[0, 50] = True
    copies = spec.copy(), var.copy(), mask.copy(), REF.copy()
    spectral_shift(spec, REF, variance=var, mask=mask, fit_stretch=True)
    spectral_shift(spec, REF, mask=mask, method="xcorr")
    assert all(np.array_equal(a, c) for a, c in zip((spec, var, mask, REF), copies))
    with pytest.raises(ParameterError, match="method"):
        spectral_shift(spec, REF, method="phase")
    with pytest.raises(ParameterError, match="reference"):
        spectral_shift(spec, REF[:-1])
    with pytest.raises(AllMaskedError):
        spectral_shift(spec, REF, mask=np.ones(spec.shape, bool))
    with pytest.raises(AllMaskedError):
        spatial_shift(np.zeros((2, 5, 5)), np.ones((2, 5, 5), bool))
