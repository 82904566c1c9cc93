"""Injection-recovery of phase curves on the phase-orbit and phase-pair scenarios.

The forward model's noise-free light curves (truth.py: the white band and every
channel with the scenario's ramps, trends, orbit-phase polynomial and scan
offsets) get white noise at the precision limit of an ideal extraction
(truth ``white_sigma``, ``channel_sigma``) and are fitted by the reducer's joint
fit with the systematics model the detrend stage would use; the pixel-level
chain is exercised end to end in test_science_phase.py.  A few small seeds
here; many seeds in tests/benchmarks/bench_phase.py, which imports
:func:`simulate_curves` and :func:`fit_curves` from this file.

Sources: Monte Carlo injection-recovery with pulls (STYLE.md item 7); the
truth's planet landmarks (truth.py) are independent of the fit.
"""

import dataclasses

import numpy as np
import pytest

from lightledger.pipeline.covariates import exposure_covariates
from lightledger.pipeline.jointfit import PlanetModel
from lightledger.pipeline.phasepost import posterior_draws
from lightledger.pipeline.programme import VisitCurves, fit_programme, quantity
from lightledger.pipeline.systematics import SystematicsInputs, standard_model
from lightledger.synthetic_data import model as vm
from lightledger.synthetic_data.render import programme_models
from lightledger.synthetic_data.scenarios import get_scenario
from lightledger.synthetic_data.sizes import resolve_size
from lightledger.synthetic_data.truth import truth_columns

MIN = 1.0 / 1440.0
#: Ramp time scales offered in the suite (the detrend stage offers 16; fewer keep it fast).
SUITE_TAU_GRID = tuple(np.array([3.0, 5.0, 7.0, 10.0, 15.0]) * MIN)


def simulate_curves(name, *, seed, n_exposures=None, n_orbits=None):
    """Noise-free truth of a scenario's visits: [(model, truth dict)], and the planet."""
    sc, n = resolve_size(get_scenario(name), n_exposures=n_exposures, n_orbits=n_orbits)
    if sc.visits:
        models = [m for _, m in programme_models(sc, seed=seed, n_exposures=n)]
    else:
        models = [vm.build_visit(sc, seed=seed, n_exposures=n)]
    out = [(m, truth_columns(m)) for m in models]
    m0 = models[0]
    planet = PlanetModel(vm.ephemeris_of(m0.scenario, m0.t0), sc.rp_rs, sc.u1, sc.u2)
    return out, planet


def fit_curves(visits, planet, *, noise_seed, tau_grid=None, alone=False, channels=None):
    """Add white noise at the truth's precision limit and fit as the detrend stage would.

    ``channels`` (an index or slice) fits a subset of the channels; ``tau_grid`` is one
    grid for every visit or a list of one grid per visit.  Returns (joint
    ProgrammeFit, [each visit alone] or None, the first truth dict, restricted to the
    channels).
    """
    pick = slice(None) if channels is None else channels
    rng = np.random.default_rng(noise_seed)
    curves = []
    for k, (m, tr) in enumerate(visits):
        sc = m.scenario
        start = m.start / 86400.0
        cov = exposure_covariates(start, start + 0.5 * m.exposure_time / 86400.0, gap_factor=3.0)
        inputs = SystematicsInputs(tr["time_bjd_tdb"], orbit=cov.orbit,
                                   orbit_time=cov.orbit_time,
                                   scan_direction=np.asarray(tr["scan_direction"], float))
        grid = tau_grid[k] if tau_grid is not None and np.ndim(tau_grid[0]) else tau_grid
        model = standard_model(visit_order=2 if sc.visit_curve else 1, orbit_order=2,
                               scan_offset=True, ramp=True, tau_grid=grid)
        drop = cov.orbit == 0
        wf = tr["white_flux"] + tr["white_sigma"] * rng.normal(size=tr["white_flux"].size)
        cs = tr["channel_sigma"][:, pick]
        cf = tr["channel_flux"][:, pick] + cs * rng.normal(size=cs.shape)
        curves.append(VisitCurves(inputs=inputs, model=model, white_flux=wf,
                                  white_variance=tr["white_sigma"] ** 2, white_mask=drop,
                                  flux=cf, variance=cs ** 2,
                                  mask=np.repeat(drop[:, None], cf.shape[1], axis=1),
                                  name=f"visit {k}"))
    joint = fit_programme(curves, planet)
    single = [fit_programme([c], planet) for c in curves] if alone else None
    truth = dict(visits[0][1])
    for key in ("eclipse_flux", "night_flux", "max_flux", "min_flux"):
        truth[key] = truth[key][pick]
    return joint, single, truth


def pulls(fit, truth):
    """Pulls (value - truth) / error per quantity: arrays over the white band + channels."""
    marks = truth["white_marks"]          # day, night, max, min (white band)
    t_day = np.append(marks[0], truth["eclipse_flux"])
    t_night = np.append(marks[1], truth["night_flux"])
    t_amp = np.append(marks[2] - marks[3], truth["max_flux"] - truth["min_flux"])
    t_off = np.full(t_day.size, truth["offset_deg"])
    fits = [fit.white] + list(fit.channels)
    out = {}
    for name, tv in (("eclipse_depth", t_day), ("night_flux", t_night), ("amplitude", t_amp),
                     ("offset_deg", t_off)):
        v = np.array([quantity(f, name) for f in fits])
        d = v[:, 0] - tv
        if name == "offset_deg":
            d = (d + 180) % 360 - 180
        out[name] = d / v[:, 1]
    return out


@pytest.fixture(scope="module")
def phase_orbit():
    # 21 orbits of 8 exposures: the full planetary orbit at a third of the default cadence.
    return simulate_curves("phase-orbit", seed=4, n_exposures=21 * 8)


@pytest.fixture(scope="module")
def phase_pair():
    return simulate_curves("phase-pair", seed=4, n_exposures=5 * 10)


def test_phase_orbit_recovers_planet_within_2_sigma(phase_orbit):
    # Injection-recovery (STYLE.md item 7) with two noise seeds: day side, night side,
    # peak-to-trough amplitude and offset of the white band and 10 channels.  Within
    # 2 sigma for at least 90% of the 88 pulls (95.4% expected for unit normal pulls;
    # 90% is 2.5 binomial standard deviations below), and the pulls' scatter within
    # 0.65-1.35 (standard error of a standard deviation of 88 values: 0.075).  The
    # pulls of one seed share the seed's systematics, so they are not independent; the
    # many-seed study is tests/benchmarks/bench_phase.py.
    visits, planet = phase_orbit
    all_pulls = []
    for noise_seed in (11, 12):
        fit, _, truth = fit_curves(visits, planet, noise_seed=noise_seed, tau_grid=SUITE_TAU_GRID)
        assert fit.white.fitted_radius and fit.white.fitted_planet
        p = pulls(fit, truth)
        all_pulls.append(np.concatenate(list(p.values())))
    z = np.concatenate(all_pulls)
    assert np.all(np.isfinite(z))
    assert np.mean(np.abs(z) < 2) >= 0.9, np.round(z, 2)
    assert 0.65 < np.std(z) < 1.35, np.std(z)


def _unscaled_eclipse_error(fit):
    return quantity(fit, "eclipse_depth")[1] / fit.error_scale


def test_phase_pair_joint_fit_sharpens_the_eclipse(phase_pair):
    # The programme fitted jointly against the eclipse visit fitted alone, two noise
    # seeds, the white band and every third channel.  Like for like (each visit's ramp
    # time scale at its injected value, the radius ratio held in both fits), adding a
    # visit that shares the planet adds information about it (common practice of joint
    # fits; the transit visit pins the phase curve's curvature near transit): the joint
    # eclipse-depth error from the given variances is smaller, for the white band and
    # for the median channel.  A joint fit that did not share the planet between the
    # visits would fail this.  (With the time scales chosen from the data and the radius
    # fitted, the joint and single errors differ by those choices too; the benchmark
    # reports that comparison over many seeds.)  Then the joint fit as the stage runs it:
    # white day side and night side within 2 sigma of the truth, the amplitude inside its
    # 95 % interval (the offset of two short visits is weakly constrained).
    visits, planet = phase_pair
    held = dataclasses.replace(planet, fit_radius=False)
    taus = [(m.scenario.orbit_ramp_tau / 86400.0,) for m, _ in visits]
    for noise_seed in (21, 22):
        joint, alone, _ = fit_curves(visits, held, noise_seed=noise_seed, tau_grid=taus,
                                     alone=True, channels=slice(0, None, 3))
        assert not alone[1].white.fitted_planet     # the transit visit holds no eclipse
        assert _unscaled_eclipse_error(joint.white) < _unscaled_eclipse_error(alone[0].white)
        med = [np.median([_unscaled_eclipse_error(f) for f in fit.channels])
               for fit in (joint, alone[0])]
        assert med[0] < med[1]
        joint, _, truth = fit_curves(visits, planet, noise_seed=noise_seed,
                                     tau_grid=SUITE_TAU_GRID, channels=slice(0, None, 3))
        p = pulls(joint, truth)
        for name in ("eclipse_depth", "night_flux"):
            assert abs(p[name][0]) < 2, (name, p[name][0])
        # the amplitude of two short visits is measured at a signal-to-noise ratio of a few:
        # its posterior is asymmetric (bounded at 0), so the truth must lie inside the
        # central 95 % of the posterior draws the summary is made from (common practice)
        draws = posterior_draws(joint.white.planet, joint.white.planet_covariance)
        lo, hi = np.percentile(2 * np.hypot(draws[:, 1], draws[:, 2]), [2.5, 97.5])
        marks = truth["white_marks"]
        assert lo < marks[2] - marks[3] < hi, (lo, marks[2] - marks[3], hi)
    # The eccentric orbit puts the eclipse away from phase 0.5 (Winn 2010; truth.py).
    eph = planet.ephemeris
    assert abs((truth["t_eclipse"] - eph.t0) / eph.period - 0.5) > 0.005
