"""Tests of lightledger.pipeline.rednoise: residual permutation and the beta factor."""

import numpy as np
import pytest

from lightledger.pipeline.errors import AllMaskedError, ParameterError
from lightledger.pipeline.rednoise import (beta_factor, cyclic_shifts, linearised_refit,
                                           residual_permutation, scaled_error)

N = 200
SIGMA = 1e-3


def _design(n=N, half=0.1):
    """Constant, visit slope and a box event of depth 1 covering a fifth of the
    series (the event short against the visit, as in a long stare)."""
    t = np.linspace(-1, 1, n)
    box = ((t > -half) & (t < half)).astype(float)
    return np.stack([np.ones(n), t, -box], axis=1)


def _fit(y, J):
    w = np.full(y.size, 1 / SIGMA ** 2)
    p, *_ = np.linalg.lstsq(J * np.sqrt(w)[:, None], y * np.sqrt(w), rcond=None)
    model = J @ p
    resid = y - model
    red = np.sum(w * resid ** 2) / (y.size - J.shape[1])
    cov = np.linalg.inv(J.T @ (J * w[:, None])) * max(red, 1.0)
    return p, model, resid, w, np.sqrt(np.diag(cov))


def _ar1(rng, n, phi):
    """Unit-variance first-order autoregressive noise (correlation length
    -1/ln(phi) samples; common practice for red noise)."""
    x = np.empty(n)
    x[0] = rng.standard_normal()
    e = rng.standard_normal(n) * np.sqrt(1 - phi ** 2)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    return x


def _ratios(noise, seeds):
    J = _design()
    out = []
    for seed in seeds:
        rng = np.random.default_rng(seed)
        y = J @ np.array([1.0, 0.002, 0.01]) + noise(rng)
        p, model, resid, w, err = _fit(y, J)
        perm = residual_permutation(linearised_refit(J, w, p, model), model, resid)
        out.append((perm.error[2] / err[2], beta_factor(resid / SIGMA)))
    return np.array(out)


def test_white_noise_permutation_agrees_with_covariance():
    # Residual permutation (common practice) on white noise estimates the
    # least-squares error; averaged over 20 noise draws it agrees with the
    # covariance error (scaled by the reduced chi-square, common practice)
    # within 20 per cent.  For one draw the estimate scatters by about 15 per
    # cent here (few independent shifts span the event), hence the average.
    # The beta factor (Winn et al. 2008) of white residuals is close to 1:
    # its expectation is about sqrt((M - 1)/M) < 1 with few bins (Pont et al.
    # 2006 white-noise expectation), so 0.7 to 1.1.
    r = _ratios(lambda rng: SIGMA * rng.standard_normal(N), range(20))
    assert 0.8 < r[:, 0].mean() < 1.2, r[:, 0].mean()
    assert 0.7 < r[:, 1].mean() < 1.1, r[:, 1].mean()


def test_red_noise_permutation_exceeds_covariance():
    # Half the variance in first-order autoregressive noise with a
    # correlation length of 10 exposures (event 20 exposures long): the
    # least-squares covariance ignores the correlation, the permutation error
    # and the beta factor see it (Pont et al. 2006; Winn et al. 2008).
    def noise(rng):
        return SIGMA * np.sqrt(0.5) * (rng.standard_normal(N) + _ar1(rng, N, np.exp(-1 / 10)))

    r = _ratios(noise, range(20))
    assert r[:, 0].mean() > 1.3, r[:, 0].mean()
    assert r[:, 1].mean() > 1.3, r[:, 1].mean()
    # scaled_error applies beta only upward
    np.testing.assert_allclose(scaled_error([1.0, 1.0, 1.0], [0.8, 1.5, np.nan]), [1.0, 1.5, 1.0])


def test_linearised_refit_is_exact_for_a_linear_model_and_masks_hold():
    # For a model linear in its parameters one Gauss-Newton step is the
    # least-squares solution (normal equations, common practice): compare
    # with numpy's lstsq on every permuted series.  Masked exposures keep
    # their data and never move.
    J = _design(60)
    rng = np.random.default_rng(5)
    y = J @ np.array([1.0, 0.001, 0.01]) + SIGMA * rng.standard_normal(60)
    mask = np.zeros(60, bool)
    mask[[3, 17, 40]] = True
    y[mask] = 50.0                          # garbage that must not enter
    keep = ~mask
    w = np.full(60, 1 / SIGMA ** 2)
    p, *_ = np.linalg.lstsq(J[keep], y[keep], rcond=None)
    model = J @ p
    resid = y - model
    copies = model.copy(), resid.copy()
    seen = []

    def refit(series):
        seen.append(series)
        return linearised_refit(J, w, p, model, fitted=keep)(series)

    perm = residual_permutation(refit, model, resid, mask=mask, n_shifts=12)
    assert perm.shifts[0] == 0 and perm.values.shape == (perm.shifts.size, 3)
    np.testing.assert_allclose(perm.values[0], p, rtol=1e-9)
    for row, vals in zip(seen[0], perm.values):
        ref, *_ = np.linalg.lstsq(J[keep], row[keep], rcond=None)
        np.testing.assert_allclose(vals, ref, rtol=1e-8, atol=1e-12)
        np.testing.assert_array_equal(row[mask], y[mask])
        np.testing.assert_allclose(np.sort(row[keep] - model[keep]), np.sort(resid[keep]))
    np.testing.assert_array_equal(model, copies[0])
    np.testing.assert_array_equal(resid, copies[1])


def test_validation():
    assert list(cyclic_shifts(10, 4)) == [0, 2, 5, 7]
    with pytest.raises(ParameterError):
        cyclic_shifts(1)
    with pytest.raises(AllMaskedError):
        residual_permutation(lambda s: s[:, :1], np.ones(3), np.zeros(3), mask=np.array([1, 1, 0], bool))
    assert np.isnan(beta_factor(np.ones(5)))
