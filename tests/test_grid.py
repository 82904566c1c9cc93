"""Tests of lightledger.pipeline.grid: the model grid on the scan scenario's light curves.

The light curves are the forward model's noise-free truth (every systematic
of the scenario, the exponential or the charge-trapping ramps) plus Gaussian
noise at the ideal optimal-extraction level the truth records
(synthetic_data/truth.py), without rendering pixels: the grid sees what a
perfect extraction would hand it.  The full render-and-reduce study over many
seeds is tests/benchmarks/bench_grid.py.
"""

import dataclasses
import functools

import numpy as np
import pytest
from scipy.stats import chi2 as chi2_dist

from lightledger.pipeline.covariates import exposure_covariates
from lightledger.pipeline.grid import Curves, channel_prior, fit_grid, marginalise_fits, rank_fits
from lightledger.pipeline.modelspec import parse_grid
from lightledger.pipeline.systematics import SystematicsInputs
from lightledger.synthetic_data import model as vm
from lightledger.synthetic_data.scenarios import get_scenario
from lightledger.synthetic_data.truth import truth_columns

#: A small grid: each ramp family, a model without ramps, a common mode.
GRID = ("visit1+scan+ramp", "visit1+orbit2+scan+ramp-shared", "visit1+orbit3+scan",
        "visit1+scan+traps", "visit1+scan+cm-sys")
N_EXPOSURES = 60
SEEDS = (0, 1, 2, 3)


def _curves(ramps, seed):
    """Truth-level white and channel light curves of the scan scenario, first orbit out."""
    sc = get_scenario("scan-transit")
    m = vm.build_visit(sc, seed=seed, n_exposures=N_EXPOSURES, ramps=ramps)
    tr = truth_columns(m)
    rng = np.random.default_rng(1000 + seed)
    F = tr["channel_flux"] + rng.standard_normal(tr["channel_flux"].shape) * tr["channel_sigma"]
    # the white band is the sum of the channels (its noise is theirs)
    W = F.sum(axis=1)
    WV = np.sum(tr["channel_sigma"] ** 2, axis=1)
    t = m.bjd_tdb
    texp = m.exposure_time
    cov = exposure_covariates(m.mjd_utc - 0.5 * texp / 86400, m.mjd_utc, gap_factor=3.0)
    n = t.size
    inputs = SystematicsInputs(
        t, orbit=cov.orbit, orbit_time=cov.orbit_time, scan_direction=m.direction.astype(float),
        covariates={"dx": m.dx, "dy": m.dy, "exposure_time": np.full(n, texp),
                    "exposure_start": (t - t[0]) * 86400.0})
    bad = cov.orbit == 0
    pix = tr["weights_channels"].sum(axis=1) * sc.scan_length
    rate = np.repeat((np.median(F, axis=0) / (pix * texp))[None], n, axis=0)
    white_rate = np.full(n, np.median(W) / (pix.sum() * texp))
    curves = Curves(inputs, W, WV, bad, F, tr["channel_sigma"] ** 2,
                    np.repeat(bad[:, None], F.shape[1], axis=1), white_rate=white_rate, rate=rate)
    event = dict(kind="transit", t0=m.t0, period=sc.period, rp_rs=sc.rp_rs, a_rs=sc.a_rs,
                 inclination=sc.inclination, u1=sc.u1, u2=sc.u2, duration=0.1)
    return curves, event, np.r_[tr["wdepth"], tr["depth"]], float(white_rate[0])


@pytest.fixture(scope="module")
def fitted():
    """The small grid fitted to four seeds of each ramp kind."""
    specs = parse_grid(GRID)
    out = {}
    for ramps in ("exponential", "traps"):
        for seed in SEEDS:
            curves, event, truth, ref = _curves(ramps, seed)
            out[ramps, seed] = (fit_grid(specs, curves, event, reference_rate=ref, n_shifts=20),
                                truth)
    return out


def _family_weight(grid, family):
    """Weight of the models holding ``family``, averaged over the white light and channels."""
    w = [grid.weight[m].mean() for m in range(len(grid.specs)) if family in grid.families(m)]
    return float(np.sum(w))


@pytest.mark.parametrize("ramps,family,other", [("exponential", "exponential ramp", "charge trapping"),
                                                ("traps", "charge trapping", "exponential ramp")])
def test_top_weighted_models_hold_the_injected_ramps(fitted, ramps, family, other):
    # Injection-recovery (STYLE.md 7): the models the criterion prefers describe
    # the kind of ramp that was injected (BIC weights, Schwarz 1978; Wakeford et al.
    # 2016).  Averaged over the white light and the channels and over four seeds,
    # the injected family outweighs the other ramp family.
    mine = np.mean([_family_weight(fitted[ramps, s][0], family) for s in SEEDS])
    theirs = np.mean([_family_weight(fitted[ramps, s][0], other) for s in SEEDS])
    assert mine > theirs, (ramps, mine, theirs)


@pytest.mark.parametrize("ramps", ["exponential", "traps"])
def test_marginalised_spectrum_is_consistent_with_the_injected_one(fitted, ramps):
    # The marginalised channel depths against the injected spectrum (truth.py
    # CHANNELS.depth) over four seeds: chi-square p above 0.01 (chi-square
    # distribution with one degree of freedom per channel and seed, common
    # practice), and the pull scatter between 0.7 and 1.3 (40 pulls: the sample
    # standard deviation of unit pulls scatters by 0.11).
    pulls = []
    for seed in SEEDS:
        grid, truth = fitted[ramps, seed]
        pulls.append((grid.value[1:] - truth[1:]) / grid.value_error[1:])
    p = np.concatenate(pulls)
    assert chi2_dist.sf(np.sum(p ** 2), p.size) > 0.01, np.round(pulls, 2)
    assert 0.7 < np.std(p) < 1.3, np.round(pulls, 2)


def test_grid_bookkeeping(fitted):
    # Marginalisation as defined (Wakeford et al. 2016): weights sum to 1 per light
    # curve, the value is the weighted mean, the error adds the spread between
    # models; the same through the generic helpers.
    grid, _ = fitted["exponential", 0]
    np.testing.assert_allclose(grid.weight.sum(axis=0), 1.0, rtol=1e-12)
    ok = grid.weight > 0
    np.testing.assert_allclose(grid.value, np.sum(np.where(ok, grid.weight * grid.depth, 0), axis=0))
    assert np.all(grid.value_error >= grid.within - 1e-15)
    # the white light ranks only its distinct models: the common-mode model shares
    # the white fit of visit1+scan... which is its own distinct white model here
    assert grid.white_owner.tolist() == list(range(len(GRID)))
    # each channel weighs the models with the white light's weights as their prior
    prior = channel_prior(grid.specs, grid.weight[:, 0], grid.white_owner, grid.common_mode_model)
    assert prior[-1] == grid.weight[grid.common_mode_model, 0] == grid.weight[:, 0].max()
    bic, aic, w = rank_fits(grid.chi2[:, 1:], grid.n_params[:, 1:], grid.n_points[:, 1:],
                            prior=prior)
    np.testing.assert_allclose(w, grid.weight[:, 1:], atol=1e-12)
    marg = marginalise_fits(grid.depth[:, 1:], grid.error[:, 1:], w)
    np.testing.assert_allclose(marg.value, grid.value[1:], rtol=1e-12)
    # every fit has its three errors; the permutation error was computed
    assert np.all(np.isfinite(grid.error_permutation[ok]))
    assert np.all(grid.error_beta[ok] >= grid.error_covariance[ok])


def test_a_model_whose_systematics_mimic_the_event_gets_no_weight():
    # A decorrelation covariate shaped like the transit (the template itself) makes
    # the depth collinear with a systematics column (at 30 times the noise, the
    # columns' 1 % difference through the multiplicative model is not seen): its error
    # inflates far beyond the variance-inflation factor of 10 that flags collinear
    # regressors (common practice), so the model is reported as failed and weighs
    # nothing, while the same model without it measures the depth.
    from lightledger.pipeline.whitelight import event_template
    curves, event, truth, ref = _curves("exponential", 0)
    rng = np.random.default_rng(5)
    k = 30.0
    noisy = dict(white_flux=curves.white_flux + (k - 1) * np.sqrt(curves.white_variance)
                 * rng.standard_normal(curves.white_flux.shape),
                 white_variance=curves.white_variance * k * k,
                 flux=curves.flux + (k - 1) * np.sqrt(curves.variance)
                 * rng.standard_normal(curves.flux.shape), variance=curves.variance * k * k)
    shape = event_template(curves.inputs.time, event)
    cov = dict(curves.inputs.covariates, dx=shape)
    curves = dataclasses.replace(curves, inputs=dataclasses.replace(curves.inputs, covariates=cov),
                                 **noisy)
    grid = fit_grid(parse_grid(["visit1+scan+ramp", "visit1+scan+ramp+dx"]), curves, event,
                    n_shifts=0, free=())
    assert np.all(grid.weight[1] == 0) and np.all(grid.weight[0] == 1)
    assert any("the depth is not determined" in f for f in grid.failures)


def test_common_mode_members_carry_the_white_lights_model_choice(monkeypatch):
    # A channel divided by the white light's common mode takes the white light's
    # choice of model with it: its depth is marginalised over the white models'
    # common modes with the white light's weights and their spread joins its error
    # (Wakeford et al. 2016).  Against the same grid with the top white model's
    # common mode alone: every other member is unchanged; a common-mode member's
    # inherited variance grows by the spread V = sum w (d - mean)^2, and the top
    # model's depth lies within sqrt(V / w_top) of the mean (V >= w_top (d_top -
    # mean)^2, since each term of the sum is >= 0).
    import lightledger.pipeline.grid as gridmod
    curves, event, _, ref = _curves("exponential", 1)
    specs = parse_grid(("visit1+scan+ramp", "visit1+orbit2+scan+ramp-shared", "visit1+orbit3+scan",
                        "visit1+scan+cm-sys", "visit1+scan+cm-res"))
    new = fit_grid(specs, curves, event, reference_rate=ref, n_shifts=0)
    monkeypatch.setattr(gridmod, "MIN_CHOICE_WEIGHT", 2.0)
    old = fit_grid(specs, curves, event, reference_rate=ref, n_shifts=0)
    w_top = new.weight[:, 0].max()
    assert w_top < 0.95, new.weight[:, 0]           # the white light does not choose alone
    np.testing.assert_array_equal(new.depth[:3], old.depth[:3])
    np.testing.assert_array_equal(new.error[:3], old.error[:3])
    np.testing.assert_array_equal(new.depth[:, 0], old.depth[:, 0])
    spread = new.error_inherited[3:, 1:] ** 2 - old.error_inherited[3:, 1:] ** 2
    assert np.all(spread > 0), spread
    np.testing.assert_allclose(new.error_covariance[3:, 1:] ** 2 - old.error_covariance[3:, 1:] ** 2,
                               spread, rtol=1e-6)
    assert np.all(np.abs(old.depth[3:, 1:] - new.depth[3:, 1:]) <= np.sqrt(spread / w_top) * (1 + 1e-9))
    assert np.any(new.depth[3:, 1:] != old.depth[3:, 1:])


def test_models_fitted_in_a_process_pool_give_the_same_grid():
    # The models' fits are independent jobs: handed to two processes (the detrend stage's
    # pool under --workers 2, tasks/fitpool.py) they give every number of the grid fitted
    # in one process, bit for bit, and the failures in the same order.
    import os

    from lightledger.tasks import fitpool

    curves, event, _, ref = _curves("traps", 0)
    specs = parse_grid(("visit1+scan+traps", "visit1+scan+ramp", "visit1+scan+cm-sys"))
    one = fit_grid(specs, curves, event, reference_rate=ref, n_shifts=5)
    fitpool.PROCESSES["count"] = 2
    try:
        with fitpool.fit_map(len(specs)) as mapper:
            assert (mapper is not map) == ((os.cpu_count() or 1) > 1)
            two = fit_grid(specs, curves, event, reference_rate=ref, n_shifts=5, map=mapper)
    finally:
        fitpool.PROCESSES["count"] = 1
    for name in ("chi2", "depth", "error", "error_inherited", "weight", "value", "value_error",
                 "best"):
        np.testing.assert_array_equal(getattr(one, name), getattr(two, name), err_msg=name)
    assert one.failures == two.failures
    for row_one, row_two in zip(one.fits, two.fits):
        for a, b in zip(row_one, row_two):
            assert (a is None) == (b is None)
            if a is not None:
                np.testing.assert_array_equal(a.model, b.model)


STARE_GRID = ("visit1", "visit1+ramp", "visit1+cm-res")


@functools.lru_cache(maxsize=1)
def _stare_truth():
    sc = get_scenario("stare-eclipse")
    m = vm.build_visit(sc, seed=1, n_exposures=150)
    return sc, m, truth_columns(m)


def _stare_curves(noise_seed):
    """Truth-level light curves of the stare scenario (eclipse with the planet's phase
    curve, a settling ramp at the start): noise-free for ``noise_seed`` None."""
    from lightledger.pipeline.detrend import tied_phase_curve
    sc, m, tr = _stare_truth()
    F = tr["channel_flux"].copy()
    if noise_seed is not None:
        F += np.random.default_rng(noise_seed).standard_normal(F.shape) * tr["channel_sigma"]
    t = m.bjd_tdb
    n = t.size
    cov = exposure_covariates(m.mjd_utc - 0.5 * m.exposure_time / 86400, m.mjd_utc, gap_factor=3.0)
    inputs = SystematicsInputs(t, orbit=cov.orbit, orbit_time=cov.orbit_time,
                               covariates={"exposure_time": np.full(n, m.exposure_time),
                                           "exposure_start": (t - t[0]) * 86400.0})
    curves = Curves(inputs, F.sum(axis=1), np.sum(tr["channel_sigma"] ** 2, axis=1),
                    np.zeros(n, bool), F, tr["channel_sigma"] ** 2, np.zeros(F.shape, bool))
    event = dict(kind="eclipse", t0=m.t0, period=sc.period, rp_rs=sc.rp_rs, a_rs=sc.a_rs,
                 inclination=sc.inclination, u1=sc.u1, u2=sc.u2, duration=0.1)
    options = dict(stare=True, n_shifts=0, event_options=dict(mode="joint",
                                                              **tied_phase_curve(t, m.t0, sc.period)))
    depth = np.r_[tr["wdepth"], tr["depth"]]
    return curves, event, depth / (1 + depth), options


def test_channels_weigh_the_models_the_white_light_supports():
    # A stare's settling ramp is clear in the white light, not in a channel with a
    # tenth of its signal.  Without the ramp a channel's eclipse comes out ~30 % deep
    # (about one error); with the white light's weights as the channel's prior the
    # marginalised channel depths are unbiased, and dividing the white light out
    # (divide-white, Berta et al. 2012) removes the ramp too.  Noise-free: every
    # marginalised depth at the injected one within 0.05 of its error.  Noisy (white
    # light = sum of the channels): pulls over 3 draws centred on 0 (mean within
    # 0.5, the shared white-light error making the 30 pulls ~3 independent) and
    # scattered like honest errors.
    specs = parse_grid(STARE_GRID)
    curves, event, truth, options = _stare_curves(None)
    grid = fit_grid(specs, curves, event, **options)
    assert np.all(np.abs(grid.value - truth) < 0.05 * grid.value_error), (grid.value - truth) / grid.value_error
    assert np.all(np.abs(grid.depth[2, 1:] - truth[1:]) < 0.05 * grid.error[2, 1:])   # divide-white
    assert np.all(grid.depth[0, 1:] - truth[1:] > 0.5 * grid.error[0, 1:])            # no ramp: deep
    pulls = []
    for draw in range(3):
        curves, event, truth, options = _stare_curves(100 + draw)
        grid = fit_grid(specs, curves, event, **options)
        assert np.all(grid.weight[0, 1:] <= 10 * grid.weight[0, 0] + 0.02)
        pulls.append((grid.value[1:] - truth[1:]) / grid.value_error[1:])
    pulls = np.concatenate(pulls)
    assert abs(np.mean(pulls)) < 0.5 and 0.6 < np.std(pulls) < 1.4, (np.mean(pulls), np.std(pulls))
