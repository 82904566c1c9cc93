"""Tests of flux-conserving resampling (lightledger.pipeline.resample)."""

import numpy as np
import pytest
from hypothesis import example, given, settings, strategies as st

from lightledger.pipeline.errors import AllMaskedError, ParameterError
from lightledger.pipeline.resample import Resampled, resample


def slow_resample(edges, flux, new_edges, variance, mask):
    """Obviously correct loop over (new bin, old pixel) overlaps of integrated flux.

    A masked pixel masks a new bin it overlaps by more than 1e-12 of its width:
    a new edge one rounding step (~1e-16 relative) inside a pixel is where the
    two grids share an edge, not an overlap (the fast kernel's fraction of that
    pixel rounds to 0 or 1 there).
    """
    n_new = len(new_edges) - 1
    out_f = np.zeros(n_new)
    out_v = np.zeros(n_new)
    out_m = np.zeros(n_new, bool)
    for j in range(n_new):
        a, b = new_edges[j], new_edges[j + 1]
        if a < edges[0] or b > edges[-1]:
            out_m[j] = True
        for i in range(len(flux)):
            overlap = min(b, edges[i + 1]) - max(a, edges[i])
            if overlap > 0:
                w = overlap / (edges[i + 1] - edges[i])
                out_f[j] += w * flux[i]
                out_v[j] += w ** 2 * variance[i]
                out_m[j] |= mask[i] and w > 1e-12
    return out_f, out_v, out_m


def integral(edges, flux, a, b):
    """Integral of the piecewise-constant density between a and b (slow)."""
    total = 0.0
    for i in range(len(flux)):
        overlap = min(b, edges[i + 1]) - max(a, edges[i])
        if overlap > 0:
            total += flux[i] * overlap / (edges[i + 1] - edges[i])
    return total


@st.composite
def grids(draw):
    n_old = draw(st.integers(2, 40))
    widths = draw(st.lists(st.floats(0.05, 3.0), min_size=n_old, max_size=n_old))
    start = draw(st.floats(-50, 50))
    edges = start + np.concatenate([[0.0], np.cumsum(widths)])
    flux = np.array(draw(st.lists(st.floats(-1e3, 1e5), min_size=n_old, max_size=n_old)))
    n_new = draw(st.integers(1, 40))
    cuts = np.sort(np.array(draw(st.lists(st.floats(0.0, 1.0), min_size=n_new + 1,
                                          max_size=n_new + 1, unique=True))))
    new_edges = edges[0] + cuts * (edges[-1] - edges[0])
    if np.any(np.diff(new_edges) <= 0):
        new_edges = np.linspace(edges[0], edges[-1], n_new + 1)
    return edges, flux, new_edges


@settings(max_examples=100, deadline=None)
@given(grids())
def test_integral_over_any_bin_edges_is_conserved(grid):
    # Carnall 2017 (arXiv:1705.05165): the resampled flux over any set of bin
    # edges equals the integral of the input's piecewise-constant density over
    # the same range; conservation law, relative tolerance 1e-10.
    edges, flux, new_edges = grid
    out = resample(edges, flux, new_edges)
    expect = integral(edges, flux, new_edges[0], new_edges[-1])
    scale = np.abs(flux).sum() + 1e-300
    assert abs(out.flux.sum() - expect) <= 1e-10 * scale
    # bins that tile the whole input range return the total exactly
    full = resample(edges, flux, np.array([edges[0], new_edges[len(new_edges) // 2]
                                           if edges[0] < new_edges[len(new_edges) // 2] < edges[-1]
                                           else 0.5 * (edges[0] + edges[-1]), edges[-1]]))
    assert abs(full.flux.sum() - flux.sum()) <= 1e-10 * scale


_SHARED = 1e-5 + np.arange(11) * 0.05          # the grids share every edge up to rounding


@settings(max_examples=100, deadline=None)
@given(grids(), st.integers(0, 2 ** 32 - 1))
@example((_SHARED, np.zeros(10), _SHARED[0] + np.linspace(0, 1, 11) * (_SHARED[-1] - _SHARED[0])),
         0)
def test_fast_kernel_agrees_with_slow_loop(grid, seed):
    # Fast cumulative-sum kernel vs the overlap loop (common practice:
    # slow reference beside a fast kernel); weights squared in the variance.
    edges, flux, new_edges = grid
    rng = np.random.default_rng(seed)
    var = rng.uniform(0.1, 10.0, flux.size)
    mask = rng.random(flux.size) < 0.1
    mask[0] = False                   # keep one good pixel
    # also let the new grid stick out of the old one
    new_edges = np.concatenate([[new_edges[0] - 0.3], new_edges[1:-1], [new_edges[-1] + 0.2]]) \
        if new_edges.size > 2 else new_edges
    out = resample(edges, flux, new_edges, variance=var, mask=mask)
    f, v, m = slow_resample(edges, flux, new_edges, var, mask)
    assert np.array_equal(out.mask, m)
    scale = np.abs(flux).sum() + 1.0
    np.testing.assert_allclose(out.flux[~m], f[~m], rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(out.variance[~m], v[~m], rtol=1e-10, atol=1e-12)
    assert np.all(np.isnan(out.flux[m]))


def test_variance_monte_carlo():
    # Monte Carlo of independent Gaussian pixels: the scatter of the resampled
    # bins matches the propagated variance (weights squared) within 3 %.
    rng = np.random.default_rng(7)
    edges = np.arange(31, dtype=float)
    new_edges = np.linspace(0.0, 30.0, 12)          # bins of 2.73 pixels
    var = rng.uniform(1.0, 4.0, 30)
    draws = rng.normal(size=(4000, 30)) * np.sqrt(var)
    out = resample(edges, draws, new_edges, variance=np.broadcast_to(var, draws.shape))
    mc = out.flux.var(axis=0, ddof=1)
    assert np.all(np.abs(mc / out.variance[0] - 1) < 0.08)
    assert abs(mc.mean() / out.variance[0].mean() - 1) < 0.03
    # the unsquared-weight sum would overstate it (pitfall noted in STYLE.md)
    unsquared = np.array([integral(edges, var, a, b) for a, b in zip(new_edges[:-1], new_edges[1:])])
    assert np.all(unsquared > out.variance[0] * 1.05)


def test_density_kind_and_per_row_edges():
    # A constant density stays constant on any grid (Carnall 2017's
    # flux-density form); integrated and density kinds agree.
    rng = np.random.default_rng(1)
    edges = np.cumsum(rng.uniform(0.5, 1.5, 21))
    new_edges = np.linspace(edges[0] + 0.1, edges[-1] - 0.1, 9)
    dens = np.full(20, 3.5)
    out = resample(edges, dens, new_edges, kind="density")
    np.testing.assert_allclose(out.flux, 3.5, rtol=1e-13)
    flux = rng.uniform(1, 10, 20)
    integ = resample(edges, flux, new_edges, variance=flux)
    dens = resample(edges, flux / np.diff(edges), new_edges, variance=flux / np.diff(edges) ** 2,
                    kind="density")
    np.testing.assert_allclose(dens.flux * np.diff(new_edges), integ.flux, rtol=1e-12)
    np.testing.assert_allclose(dens.variance * np.diff(new_edges) ** 2, integ.variance, rtol=1e-12)
    # every row with its own edges equals row-by-row calls
    stack_edges = np.stack([edges, edges + 0.37, edges - 0.21])
    stack_flux = rng.uniform(1, 10, (3, 20))
    both = resample(stack_edges, stack_flux, new_edges)
    for k in range(3):
        one = resample(stack_edges[k], stack_flux[k], new_edges)
        np.testing.assert_array_equal(one.mask, both.mask[k])
        np.testing.assert_allclose(one.flux, both.flux[k], rtol=1e-13)


def test_inputs_not_mutated_and_errors():
    # photutils' test_input_data_not_mutated practice; mask contract of STYLE.md
    edges = np.arange(11, dtype=float)
    flux = np.arange(10, dtype=float)
    flux[3] = np.nan
    var = np.ones(10)
    mask = np.zeros(10, bool)
    mask[6] = True
    copies = [a.copy() for a in (edges, flux, var, mask)]
    out = resample(edges, flux, np.linspace(0, 10, 6), variance=var, mask=mask)
    assert isinstance(out, Resampled)
    assert list(out.mask) == [False, True, False, True, False]   # NaN pixel 3, masked pixel 6
    for a, c in zip((edges, flux, var, mask), copies):
        assert np.array_equal(a, c, equal_nan=True)
    with pytest.raises(ParameterError, match="kind"):
        resample(edges, var, edges, kind="mean")
    with pytest.raises(ParameterError, match="new_edges"):
        resample(edges, var, edges[::-1])
    with pytest.raises(ParameterError, match="edges"):
        resample(edges[:-1], var, edges)
    with pytest.raises(AllMaskedError):
        resample(edges, var, edges, mask=np.ones(10, bool))
