"""Tests of lightledger.pipeline.binning: conservation laws, Monte Carlo, a reference loop."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from lightledger.pipeline.binning import (bin_spectra, channel_edges_from_list,
                                          equal_count_channel_edges, overlap_weights,
                                          uniform_channel_edges, white_band_edges)
from lightledger.pipeline.errors import AllMaskedError, ParameterError


def _slow_integral(pixel_edges, density_per_pixel, lo, hi):
    """Obviously correct reference: integral over [lo, hi] of counts spread uniformly
    over each pixel, one pixel at a time."""
    total = 0.0
    for i in range(len(pixel_edges) - 1):
        a, b = sorted((pixel_edges[i], pixel_edges[i + 1]))
        overlap = max(0.0, min(b, hi) - max(a, lo))
        total += density_per_pixel[i] * overlap / (b - a)
    return total


@st.composite
def _grids(draw):
    nx = draw(st.integers(2, 40))
    widths = np.array(draw(st.lists(st.floats(0.01, 1.0), min_size=nx, max_size=nx)))
    start = draw(st.floats(0.5, 2.0))
    pe = start + np.concatenate([[0.0], np.cumsum(widths)])
    n_ch = draw(st.integers(1, 12))
    fr = np.sort(np.array(draw(st.lists(st.floats(0.001, 0.999), min_size=n_ch - 1,
                                        max_size=n_ch - 1, unique=True))))
    inner = pe[0] + fr * (pe[-1] - pe[0])
    ce = np.concatenate([[pe[0]], inner, [pe[-1]]])
    flux = np.array(draw(st.lists(st.floats(-1e3, 1e6), min_size=nx, max_size=nx)))
    reverse = draw(st.booleans())
    return pe, ce, flux, reverse


@settings(max_examples=100, deadline=None)
@given(_grids())
def test_flux_conserved_for_random_edges(grid):
    # Conservation law: channels that tile the pixels' range hold every electron.
    pe, ce, flux, reverse = grid
    if np.any(np.diff(ce) <= 0):
        return  # coincident random edges (rounding); not a valid channel list
    if reverse:  # wavelength decreasing along x
        pe, flux = pe[::-1].copy(), flux[::-1].copy()
    f = flux[None, :]
    res = bin_spectra(pe, f, np.ones_like(f), np.zeros(f.shape, bool), ce)
    scale = np.sum(np.abs(flux)) + 1e-300
    assert abs(res.flux.sum() - flux.sum()) <= 1e-12 * scale
    # Each channel equals the slow reference integral over its edges (exact up to rounding).
    ref = [_slow_integral(pe, flux, ce[j], ce[j + 1]) for j in range(len(ce) - 1)]
    np.testing.assert_allclose(res.flux[0], ref, rtol=0, atol=1e-12 * scale)


def test_weights_match_reference_loop_and_sum_to_one():
    rng = np.random.default_rng(0)
    pe = 1.0 + np.cumsum(rng.uniform(0.002, 0.01, 61))
    ce = np.linspace(pe[5], pe[-7], 9)
    w = overlap_weights(pe, ce)
    ref = np.zeros_like(w)
    for i in range(pe.size - 1):
        for j in range(ce.size - 1):
            ref[i, j] = _slow_integral(pe[i:i + 2], [1.0], ce[j], ce[j + 1])
    np.testing.assert_allclose(w, ref, atol=1e-13)
    inside = (pe[:-1] >= ce[0]) & (pe[1:] <= ce[-1])
    # Conservation: a pixel wholly inside the channels' range is shared out completely.
    np.testing.assert_allclose(w[inside].sum(axis=1), 1.0, atol=1e-13)


def test_binned_errors_match_monte_carlo():
    # Monte Carlo: the scatter of binned flux over independent noise draws matches the
    # propagated sqrt(sum w^2 var) within 3% (the sample std of 20000 draws is good to
    # ~0.5%).  Channels cut pixels at arbitrary points so the w^2 matters.
    rng = np.random.default_rng(42)
    nx, n_draw = 30, 20000
    pe = 1.1 + 0.01 * np.arange(nx + 1)
    truth = rng.uniform(1e3, 5e3, nx)
    var = truth + 14.0 ** 2
    ce = np.array([1.113, 1.1372, 1.1655, 1.2, 1.3899])
    draws = truth + rng.normal(size=(n_draw, nx)) * np.sqrt(var)
    res = bin_spectra(pe, draws, np.broadcast_to(var, draws.shape), np.zeros(nx, bool), ce)
    mc_std = res.flux.std(axis=0, ddof=1)
    pred = np.sqrt(res.variance[0])
    np.testing.assert_allclose(mc_std, pred, rtol=0.03)
    # Summing variance with unsquared weights would overestimate it; in the three narrow
    # channels (2-4 pixels, both ends cut) the test can tell the difference.
    wrong = np.sqrt(var @ res.weights)
    assert np.all(wrong[:3] > 1.05 * mc_std[:3])


def test_masked_pixel_flagged_or_filled_never_dropped():
    rng = np.random.default_rng(1)
    nx, n_exp = 20, 3
    pe = 1.0 + 0.05 * np.arange(nx + 1)
    model = rng.uniform(100, 200, (n_exp, nx))
    flux, var = model.copy(), model + 10.0
    mask = np.zeros((n_exp, nx), bool)
    mask[1, 7] = True
    flux[1, 7] = 1e9  # a bad value that must not leak through
    ce = np.array([1.0, 1.33, 1.52, 2.0])   # pixel 7 spans 1.35-1.40: channel 1 only
    inputs = [a.copy() for a in (flux, var, mask)]
    res = bin_spectra(pe, flux, var, mask, ce)
    assert res.mask.tolist() == [[False] * 3, [False, True, False], [False] * 3]
    assert np.isnan(res.flux[1, 1]) and np.isnan(res.variance[1, 1])
    # Filling from the model restores the noiseless answer exactly (conservation).
    filled = bin_spectra(pe, flux, var, mask, ce, fill=model)
    assert not filled.mask.any()
    np.testing.assert_allclose(filled.flux, model @ filled.weights, rtol=1e-14)
    assert filled.n_filled[1].tolist() == [0, 1, 0] and filled.n_filled.sum() == 1
    # A fill without a usable variance still flags the channel.
    var_bad = var.copy()
    var_bad[1, 7] = np.nan
    res3 = bin_spectra(pe, flux, var_bad, mask, ce, fill=model)
    assert res3.mask[1, 1] and res3.mask.sum() == 1
    res4 = bin_spectra(pe, flux, var_bad, mask, ce, fill=model, fill_variance=model)
    assert not res4.mask.any()
    # Inputs are not modified (STYLE.md).
    for a, b in zip(inputs, (flux, var, mask)):
        np.testing.assert_array_equal(a, b)
    with pytest.raises(AllMaskedError):
        bin_spectra(pe, flux, var, np.ones(nx, bool), ce)


def test_equal_count_edges_hold_equal_counts():
    # Conservation: binning the mean spectrum into its own equal-count edges gives
    # total / n in every channel.
    rng = np.random.default_rng(5)
    nx = 80
    pe = 1.05 + 0.0087 * np.arange(nx + 1)
    spec = 1e4 * np.exp(-0.5 * ((np.arange(nx) - 30) / 15.0) ** 2) + rng.uniform(0, 50, nx)
    spec[10] = np.nan  # counted as zero photons
    for rev in (False, True):
        p, s = (pe[::-1], spec[::-1]) if rev else (pe, spec)
        edges = equal_count_channel_edges(p, s, 7, wavelength_range=(1.1, 1.7))
        assert edges[0] == 1.1 and edges[-1] == 1.7 and np.all(np.diff(edges) > 0)
        s0 = np.nan_to_num(s)
        res = bin_spectra(p, s0[None], np.ones((1, nx)), np.zeros(nx, bool), edges)
        np.testing.assert_allclose(res.flux[0], res.flux[0].mean(), rtol=1e-12)


def test_edge_builders():
    np.testing.assert_allclose(uniform_channel_edges((1.1, 1.7), n_channels=3), [1.1, 1.3, 1.5, 1.7])
    np.testing.assert_allclose(uniform_channel_edges((1.1, 1.7), width=0.2), [1.1, 1.3, 1.5, 1.7])
    np.testing.assert_allclose(uniform_channel_edges((1.1, 1.75), width=0.2), [1.1, 1.3, 1.5, 1.7])
    np.testing.assert_array_equal(white_band_edges((1.1, 1.7)), [1.1, 1.7])
    np.testing.assert_array_equal(channel_edges_from_list([1.0, 1.2, 1.5]), [1.0, 1.2, 1.5])
    with pytest.raises(ParameterError, match="edges"):
        channel_edges_from_list([1.0, 0.9])
    with pytest.raises(ParameterError, match="exactly one"):
        uniform_channel_edges((1.1, 1.7), width=0.1, n_channels=3)
    with pytest.raises(ParameterError, match="channel_edges"):
        bin_spectra([1.0, 1.1, 1.2], np.ones((1, 2)), np.ones((1, 2)), np.zeros(2, bool), [0.9, 1.2])
    with pytest.raises(ParameterError, match="mask"):
        bin_spectra([1.0, 1.1, 1.2], np.ones((1, 2)), np.ones((1, 2)), np.zeros(2), [1.0, 1.2])
