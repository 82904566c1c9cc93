"""Tests of lightledger.pipeline.ramps (up-the-ramp slopes, jumps, saturation)."""

import numpy as np
import pytest

from lightledger.pipeline import mask as dq
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.ramps import fit_ramps, masked_median

READ_NOISE = 14.0  # e- per read, a realistic value (REFERENCES.md, facts of the trade)


def simulate(rng, rate, n_reads=8, dt=10.0, shape=(100, 200), read_noise=READ_NOISE, times=None):
    """Cumulative ramps: Poisson charge per interval plus white read noise."""
    t = np.arange(n_reads) * dt if times is None else np.asarray(times, float)
    n_reads = t.size
    lam = np.broadcast_to(np.asarray(rate, float), shape) * np.diff(t)[:, None, None]
    inc = rng.poisson(lam)
    q = np.concatenate([np.zeros((1,) + shape), np.cumsum(inc, axis=0)])
    return q + rng.normal(0.0, read_noise, q.shape), t


def rauscher_variance(n, dt, s, f):
    # Rauscher et al. 2007, PASP 119, 768, eq. 1 with one frame per group (from memory,
    # as written in REFERENCES.md)
    return 12 * s**2 / (n * (n**2 - 1) * dt**2) + 6 * (n**2 + 1) * f / (5 * n * (n**2 - 1) * dt)


@pytest.mark.parametrize("flux", [1.0, 30.0, 300.0])
def test_unweighted_variance_matches_rauscher_and_monte_carlo(flux):
    rng = np.random.default_rng(10)
    reads, t = simulate(rng, flux)
    fit = fit_ramps(reads, t, read_noise=READ_NOISE, weighting="unweighted")
    expected = rauscher_variance(8, 10.0, READ_NOISE, flux)
    # the stated variance follows Rauscher eq. 1 (it uses the fitted flux, so average it)
    assert np.mean(fit.rate_variance) == pytest.approx(expected, rel=0.02)
    # Monte Carlo of 20000 ramps: sample variance within 5% (its own error is ~1%)
    assert np.var(fit.rate) == pytest.approx(expected, rel=0.05)
    assert abs(np.mean(fit.rate) - flux) < 5 * np.sqrt(expected / fit.rate.size)


@pytest.mark.parametrize("flux", [1.0, 30.0, 300.0])
def test_optimal_variance_matches_monte_carlo_and_beats_ols(flux):
    rng = np.random.default_rng(11)
    reads, t = simulate(rng, flux)
    fit = fit_ramps(reads, t, read_noise=READ_NOISE, weighting="optimal")
    stated = np.mean(fit.rate_variance)
    # Monte Carlo (Fixsen et al. 2000 weights): sample variance within 5% of the stated one
    assert np.var(fit.rate) == pytest.approx(stated, rel=0.05)
    # generalised least squares never does worse than ordinary least squares (Gauss-Markov)
    assert stated <= rauscher_variance(8, 10.0, READ_NOISE, flux) * 1.001
    # unbiased: pull of the mean below 5 sigma of the mean
    assert abs(np.mean(fit.rate) - flux) < 5 * np.sqrt(stated / fit.rate.size)


def test_sum_weighting_is_difference_sum():
    rng = np.random.default_rng(12)
    reads, t = simulate(rng, 50.0, shape=(10, 10))
    fit = fit_ramps(reads, t, read_noise=READ_NOISE, weighting="sum", max_jumps=0)
    # exact identity: the sum of differences telescopes to last - first read
    np.testing.assert_allclose(fit.rate, (reads[-1] - reads[0]) / (t[-1] - t[0]), rtol=1e-12)
    # and its variance is 2 s^2 / T^2 + f / T (read noise of two reads, Poisson of the charge)
    np.testing.assert_allclose(fit.rate_variance, 2 * READ_NOISE**2 / 70.0**2 + fit.rate / 70.0, rtol=1e-10)


def test_jumps_found_and_slopes_unbiased():
    rng = np.random.default_rng(13)
    flux = 40.0
    shape = (100, 200)
    reads, t = simulate(rng, flux, shape=shape)
    sigma_d = np.sqrt(2 * READ_NOISE**2 + flux * 10.0)
    hit = rng.random(shape) < 0.05
    yy, xx = np.nonzero(hit)
    k = rng.integers(0, 7, yy.size)
    amp = rng.uniform(10.0, 40.0, yy.size) * sigma_d
    hit_reads = reads.copy()
    for kk in range(7):  # loop over reads, not pixels: charge stays after the hit
        sel = k == kk
        hit_reads[kk + 1:, yy[sel], xx[sel]] += amp[sel]
    fit = fit_ramps(hit_reads, t, read_noise=READ_NOISE)
    truth = np.zeros((7,) + shape, bool)
    truth[k, yy, xx] = True
    # Anderson & Gordon 2011: completeness of injected hits above 10 sigma >= 95%
    completeness = fit.jumps[truth].mean()
    assert completeness >= 0.95
    # false alarms below 0.1% of clean pixel-differences
    false_rate = fit.jumps[~truth].mean()
    assert false_rate < 1e-3
    assert np.all(fit.bits[hit] & dq.RAMP_BREAK)
    # slopes of hit pixels unbiased within their own error (pull mean ~0, unit scatter)
    pull = (fit.rate[hit] - flux) / np.sqrt(fit.rate_variance[hit])
    assert abs(np.mean(pull)) < 0.1
    assert 0.85 < np.std(pull) < 1.15
    print(f"completeness {completeness:.4f} false alarms {false_rate:.2e} "
          f"pull mean {np.mean(pull):+.3f} std {np.std(pull):.3f}")


def test_saturating_pixel_keeps_unbiased_slope():
    rng = np.random.default_rng(14)
    flux = 500.0
    reads, t = simulate(rng, flux, shape=(50, 100))
    level = 2.2e4  # reached between read 4 (20000 e-) and read 5 (25000 e-)
    fit = fit_ramps(reads, t, read_noise=READ_NOISE, saturated=reads > level)
    assert np.all(fit.bits & dq.OVERFILLED)
    assert np.all(fit.n_used_reads == 5)
    np.testing.assert_allclose(fit.mean_read_time, np.mean(t[:5]))
    # unbiased from the unsaturated reads; Monte Carlo variance agrees with the stated one
    stated = np.mean(fit.rate_variance)
    assert abs(np.mean(fit.rate) - flux) < 5 * np.sqrt(stated / fit.rate.size)
    assert np.var(fit.rate) == pytest.approx(stated, rel=0.1)


def test_short_ramp_and_not_finite():
    rng = np.random.default_rng(15)
    reads, t = simulate(rng, 20.0, shape=(4, 5))
    sat = np.zeros(reads.shape, bool)
    sat[1:, 0, 0] = True  # only read 0 left
    reads[3, 1, 1] = np.nan
    fit = fit_ramps(reads, t, read_noise=READ_NOISE, saturated=sat)
    assert fit.bits[0, 0] & dq.NO_SLOPE and np.isnan(fit.rate[0, 0])
    assert fit.bits[1, 1] & dq.INVALID_VALUE and np.isfinite(fit.rate[1, 1])
    assert fit.n_used_reads[1, 1] == 7
    assert np.all(np.isfinite(fit.rate[2:]))


def _reference_fit(r, t, s, sat, threshold=5.0, max_jumps=3, n_iter=2):
    """Slow, obvious per-pixel version of fit_ramps(weighting='optimal')."""
    n = r.shape[0]
    good = np.isfinite(r) & ~np.logical_or.accumulate(sat)
    dt = np.diff(t)
    d = np.diff(r)
    use = good[1:] & good[:-1]
    jumps = np.zeros(n - 1, bool)
    med = np.median(d[use] / dt[use]) if use.any() else 0.0
    if use.sum() >= 3:
        for _ in range(max_jumps):
            sig = np.sqrt(2 * s**2 + max(med, 0) * dt)
            z = np.where(use, np.abs(d - med * dt) / sig, 0.0)
            k = int(np.argmax(z))
            if z[k] <= threshold:
                break
            jumps[k] = True
            use[k] = False
            med = np.median(d[use] / dt[use])
            if use.sum() < 3:
                break
    idx = np.flatnonzero(use)
    if idx.size == 0:
        return np.nan, np.nan, jumps

    def cov(f):
        c = np.zeros((n - 1, n - 1))
        for i in range(n - 1):
            c[i, i] = 2 * s**2 + max(f, 0) * dt[i]
            if i + 1 < n - 1:
                c[i, i + 1] = c[i + 1, i] = -s**2
        return c[np.ix_(idx, idx)]

    f = med
    for _ in range(n_iter):
        c = cov(f)
        x = np.linalg.solve(c, dt[idx])
        f = x @ d[idx] / (x @ dt[idx])
    var = x @ cov(f) @ x / (x @ dt[idx]) ** 2
    return f, var, jumps


def test_fast_kernel_matches_slow_reference_loop():
    rng = np.random.default_rng(16)
    shape = (6, 7)
    rate = rng.uniform(0.0, 400.0, shape)
    rate[2, 2] = rate[4, 1] = 50.0
    times = [0.0, 3.0, 8.0, 15.0, 22.0, 35.0, 40.0, 52.0]  # unequal spacing
    reads, t = simulate(rng, rate, shape=shape, times=times)
    reads[3:, 2, 2] += 3000.0  # a jump
    reads[5:, 4, 1] += 800.0
    sat = reads > 1.6e4
    fit = fit_ramps(reads, t, read_noise=READ_NOISE, saturated=sat)
    for y in range(shape[0]):  # the slow loop over pixels lives in the test only
        for x in range(shape[1]):
            f, v, j = _reference_fit(reads[:, y, x], t, READ_NOISE, sat[:, y, x])
            np.testing.assert_allclose(fit.rate[y, x], f, rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(fit.rate_variance[y, x], v, rtol=1e-9)
            np.testing.assert_array_equal(fit.jumps[:, y, x], j)
    assert fit.jumps[2, 2, 2] and fit.jumps[4, 4, 1]


def test_inputs_not_mutated_and_errors():
    rng = np.random.default_rng(17)
    reads, t = simulate(rng, 10.0, shape=(5, 5))
    sat = reads > 1e9
    r0, t0, s0 = reads.copy(), t.copy(), sat.copy()
    fit_ramps(reads, t, read_noise=READ_NOISE, saturated=sat)
    np.testing.assert_array_equal(reads, r0)
    np.testing.assert_array_equal(t, t0)
    np.testing.assert_array_equal(sat, s0)
    with pytest.raises(ParameterError, match="weighting"):
        fit_ramps(reads, t, read_noise=READ_NOISE, weighting="best")
    with pytest.raises(ParameterError, match="read_times"):
        fit_ramps(reads, t[::-1], read_noise=READ_NOISE)


def test_masked_median_matches_numpy_nanmedian():
    rng = np.random.default_rng(18)
    x = rng.normal(size=(7, 30, 11))
    m = rng.random(x.shape) < 0.3
    med, n = masked_median(x, m, axis=0)
    # reference: numpy.nanmedian on the masked values
    ref = np.nanmedian(np.where(m, np.nan, x), axis=0)
    np.testing.assert_allclose(med[n > 0], ref[n > 0])
    np.testing.assert_array_equal(n, (~m).sum(axis=0))


# --- fast kernels against slow references ----------------------------------------------


def test_merge_network_sorts_every_zero_one_input():
    # zero-one principle (Knuth, TAOCP vol. 3, sec. 5.3.4, from memory): a comparator
    # network sorts every input iff it sorts all 2**m inputs of zeros and ones
    from itertools import product

    from lightledger.pipeline.ramps import _merge_network

    for m in range(1, 11):
        x = np.array(list(product([0.0, 1.0], repeat=m))).T  # (m, 2**m)
        lanes = list(x)
        for i, j in _merge_network(m):
            assert 0 <= i < j < m
            lanes[i], lanes[j] = np.minimum(lanes[i], lanes[j]), np.maximum(lanes[i], lanes[j])
        np.testing.assert_array_equal(np.array(lanes), np.sort(x, axis=0))


def _slow_masked_median(x, m, axis):
    """One line at a time: numpy.median of the finite, unmasked values."""
    xs, ms = np.moveaxis(x, axis, -1), np.moveaxis(m, axis, -1)
    med = np.full(xs.shape[:-1], np.nan)
    cnt = np.zeros(xs.shape[:-1], int)
    for idx in np.ndindex(*xs.shape[:-1]):
        v = xs[idx][~ms[idx] & np.isfinite(xs[idx])]
        cnt[idx] = v.size
        if v.size:
            med[idx] = np.median(v)
    return med, cnt


@pytest.mark.parametrize("shape, axis", [((1, 9), 0), ((2, 50), 0), ((3, 4, 5), 0), ((4, 30, 7), 0),
                                         ((5, 6, 40), 1), ((7, 20, 3), 0), ((8, 6, 5), -3),
                                         ((9, 6, 5), 0), ((6, 5, 12), 2), ((40, 30), 0),
                                         ((7, 30, 181), 2), ((17,), 0), ((5,), -1)])
def test_masked_median_matches_slow_reference_loop(shape, axis):
    # covers the comparator-network path (axis length <= 8, with and without masked
    # lines) and the sort path; reference: numpy.median line by line
    rng = np.random.default_rng(19)
    x = rng.normal(size=shape)
    x[rng.random(shape) < 0.05] = np.nan
    x[rng.random(shape) < 0.02] = np.inf
    x[rng.random(shape) < 0.02] = -np.inf
    x.flat[::7] = np.round(x.flat[::7], 1)  # ties
    mask = rng.random(shape) < 0.25
    if x.ndim > 1:
        lead = np.moveaxis(mask, axis, -1)
        lead[(0,) * (x.ndim - 1)] = True  # one line entirely masked
    x0, m0 = x.copy(), mask.copy()
    med, n = masked_median(x, mask, axis=axis)
    ref, cnt = _slow_masked_median(x, mask, axis)
    np.testing.assert_array_equal(x, x0)  # inputs not modified
    np.testing.assert_array_equal(mask, m0)
    np.testing.assert_array_equal(n, cnt)
    assert n.dtype.kind == "i"
    np.testing.assert_array_equal(np.isnan(med), cnt == 0)
    np.testing.assert_allclose(med, ref, rtol=1e-12, atol=0)


def _reference_fit_any(r, t, s, sat, weighting, threshold=5.0, max_jumps=3, n_iter=2, min_diffs=3):
    """Per-pixel fit for any weighting: rate, variance, jumps, reads used, mean read time."""
    n = r.shape[0]
    good = np.isfinite(r) & ~np.logical_or.accumulate(sat)
    dt = np.diff(t)
    with np.errstate(invalid="ignore"):
        d = np.diff(r)
    use = good[1:] & good[:-1]
    jumps = np.zeros(n - 1, bool)
    med = np.median(d[use] / dt[use]) if use.any() else np.nan
    if use.sum() >= min_diffs:
        for _ in range(max_jumps):
            sig = np.sqrt(2 * s**2 + max(med, 0) * dt)
            z = np.zeros(n - 1)
            z[use] = np.abs(d[use] - med * dt[use]) / sig[use]
            k = int(np.argmax(z))
            if z[k] <= threshold:
                break
            jumps[k] = True
            use[k] = False
            med = np.median(d[use] / dt[use])
            if use.sum() < min_diffs:
                break
    read_used = np.zeros(n, bool)
    read_used[:-1] |= use
    read_used[1:] |= use
    mean_t = (t - t[0])[read_used].mean() if read_used.any() else np.nan
    idx = np.flatnonzero(use)
    if idx.size == 0:
        return np.nan, np.nan, jumps, read_used.sum(), mean_t

    def cov(f, s_):
        c = np.zeros((n - 1, n - 1))
        for i in range(n - 1):
            c[i, i] = 2 * s_**2 + max(f, 0) * dt[i]
            if i + 1 < n - 1:
                c[i, i + 1] = c[i + 1, i] = -s_**2
        return c[np.ix_(idx, idx)]

    f = med
    if weighting == "sum":
        x = np.ones(idx.size)
        f = x @ d[idx] / (x @ dt[idx])
    elif weighting == "unweighted":
        x = np.linalg.solve(cov(0.0, 1.0), dt[idx])
        f = x @ d[idx] / (x @ dt[idx])
    else:
        for _ in range(n_iter):
            x = np.linalg.solve(cov(f, s), dt[idx])
            f = x @ d[idx] / (x @ dt[idx])
    var = x @ cov(f, s) @ x / (x @ dt[idx]) ** 2
    return f, var, jumps, read_used.sum(), mean_t


@pytest.mark.parametrize("weighting, n_reads", [("optimal", 5), ("optimal", 12), ("unweighted", 8),
                                                ("sum", 6)])
def test_fast_kernel_matches_reference_with_nans_saturation_and_many_jumps(weighting, n_reads):
    # the vectorised kernel (comparator-network medians, jump passes over the changed
    # pixels only, in-place Thomas solver) against the per-pixel loop with numpy's
    # median and dense linear algebra, on ramps with NaN reads, saturation and up to
    # three jumps per pixel
    rng = np.random.default_rng(20 + n_reads)
    shape = (9, 11)
    rate = rng.uniform(-5.0, 500.0, shape)
    times = np.cumsum(rng.uniform(2.0, 12.0, n_reads)) - 2.0  # unequal spacing
    reads, t = simulate(rng, np.maximum(rate, 0.0), shape=shape, times=times)
    hits = rng.random((n_reads,) + shape) < 0.08
    reads += np.cumsum(np.where(hits, rng.uniform(500.0, 5000.0, reads.shape), 0.0), axis=0)
    reads[rng.random(reads.shape) < 0.03] = np.nan
    reads[:, 0, 0] = np.nan  # a pixel with no read at all
    sat = reads > 2.0e4
    sat[2:, 1, 1] = True  # two reads left: one difference
    # three differences, two of them with jumps (3000 and 8000 e-/s over their interval):
    # one is dropped, and with two left there are too few for another search
    # (min_diffs_for_jumps = 3), although the two still disagree by > 10 sigma
    steps = np.concatenate([[0.0], np.diff(t) * np.array([0.0, 3000.0, 8000.0] + [0.0] * (n_reads - 4))])
    reads[:, 3, 3] = 50.0 * t + np.cumsum(steps)
    sat[:, 3, 3] = np.arange(n_reads) >= 4
    fit = fit_ramps(reads, t, read_noise=READ_NOISE, saturated=sat, weighting=weighting)
    assert fit.jumps[:, 3, 3].sum() == 1
    assert fit.jumps.sum(axis=0).max() >= 2  # later jump passes are exercised
    for y in range(shape[0]):  # the slow loop over pixels lives in the test only
        for x in range(shape[1]):
            f, v, j, nu, mt = _reference_fit_any(reads[:, y, x], t, READ_NOISE, sat[:, y, x], weighting)
            np.testing.assert_array_equal(fit.jumps[:, y, x], j)
            assert fit.n_used_reads[y, x] == nu
            np.testing.assert_allclose(fit.rate[y, x], f, rtol=1e-12, atol=1e-12)
            np.testing.assert_allclose(fit.rate_variance[y, x], v, rtol=1e-12)
            np.testing.assert_allclose(fit.mean_read_time[y, x], mt, rtol=1e-12)
    assert fit.bits[0, 0] & dq.NO_SLOPE and fit.bits[0, 0] & dq.INVALID_VALUE
    assert fit.bits[1, 1] & dq.OVERFILLED
