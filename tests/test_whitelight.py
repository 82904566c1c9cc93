"""Tests of lightledger.pipeline.whitelight and lightledger.pipeline.fiterrors."""

import batman
import numpy as np
import pytest

from lightledger.pipeline.eventfit import fit_event
from lightledger.pipeline.fiterrors import depth_errors, linearise_fit
from lightledger.pipeline.detrend import tied_phase_curve
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.modelspec import parse_model
from lightledger.pipeline.systematics import DEFAULT_TAU_GRID, SystematicsInputs
from lightledger.pipeline.whitelight import event_template, fit_white

MIN = 1.0 / 1440.0
TAU = DEFAULT_TAU_GRID[6]          # a ramp time scale on the default grid (5.2 min)
EVENT = dict(kind="transit", t0=2460500.3, period=2.7, rp_rs=0.12, a_rs=9.0, inclination=87.5,
             u1=0.2, u2=0.25, duration=0.11)


def _inputs(n_orbits=4, per_orbit=16):
    start = np.concatenate([o * 96 * MIN + np.arange(per_orbit) * 3.0 * MIN for o in range(n_orbits)])
    mid = start - 0.5 * (start[0] + start[-1]) + EVENT["t0"]
    orbit = np.repeat(np.arange(n_orbits), per_orbit)
    first = np.array([mid[orbit == o][0] for o in orbit])
    return SystematicsInputs(mid, orbit=orbit, orbit_time=mid - first,
                             scan_direction=np.where(np.arange(mid.size) % 2, -1.0, 1.0))


def _batman(t, *, t0, u1, u2, rp=EVENT["rp_rs"]):
    """Reference transit from batman (Kreidberg 2015)."""
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc = t0, EVENT["period"], rp, EVENT["a_rs"], EVENT["inclination"]
    p.ecc, p.w, p.limb_dark, p.u = 0.0, 90.0, "quadratic", [u1, u2]
    return batman.TransitModel(p, t).light_curve(p)


def test_template_matches_batman_per_channel():
    # The unit-depth transit shape (1 - F) / rp^2 against batman (Kreidberg 2015), one
    # pair of limb-darkening coefficients per channel (tolerance 1e-6 of the depth: the
    # quadrature of pipeline/transit.py agrees with batman to 1e-7 in flux).
    t = _inputs().time
    u1, u2 = np.array([0.1, 0.3, 0.45]), np.array([0.3, 0.2, 0.1])
    tmpl = event_template(t, EVENT, u1=u1, u2=u2)
    assert tmpl.shape == (t.size, 3)
    for j in range(3):
        ref = (1 - _batman(t, t0=EVENT["t0"], u1=u1[j], u2=u2[j])) / EVENT["rp_rs"] ** 2
        np.testing.assert_allclose(tmpl[:, j], ref, atol=1e-6 * ref.max() / EVENT["rp_rs"] ** 2 * 0.0144)


def _white_curve(inputs, rng, *, shift=0.0, sigma=1e-4, noise=True):
    """batman transit with a mid-time off the ephemeris by ``shift`` days, times a
    visit slope, orbit-phase slope and exponential ramps (Berta et al. 2012;
    Kreidberg et al. 2014), plus white noise."""
    t = inputs.time
    x = (t - t.mean()) / (0.5 * np.ptp(t))
    sys = 1 + 4e-4 * x + 6e-4 * inputs.orbit_time / inputs.orbit_time.max() \
        - 1.5e-3 * np.exp(-inputs.orbit_time / TAU)
    flux = 3e7 * sys * _batman(t, t0=EVENT["t0"] + shift, u1=EVENT["u1"], u2=EVENT["u2"])
    noisy = flux * (1 + sigma * rng.standard_normal(t.size)) if noise else flux
    return noisy, (3e7 * sigma) ** 2 * np.ones(t.size)


def test_white_light_finds_the_mid_time():
    # Injection-recovery: a transit 4 minutes late against the ephemeris.  Noise-free,
    # the fitted mid-time is the injected one to 0.1 s; the depth is the batman
    # model's (rp/rs)^2 (template normalised by rp^2).
    inputs = _inputs()
    model = parse_model("visit1+orbit1+ramp-shared").systematics()
    flux, var = _white_curve(inputs, np.random.default_rng(0), shift=4 * MIN, noise=False)
    wf = fit_white(inputs, flux, var, model, EVENT)
    assert wf.event["t0"] == pytest.approx(EVENT["t0"] + 4 * MIN, abs=1e-6)
    assert wf.result.depth == pytest.approx(EVENT["rp_rs"] ** 2, rel=1e-5)
    assert wf.shapes["ramp.tau"] == TAU
    assert dict(wf.result.shapes)["event.t0"] == wf.event["t0"]
    # fixed ephemeris: the mid-time is not fitted, one parameter fewer
    fixed = fit_white(inputs, flux, var, model, EVENT, free=())
    assert fixed.event["t0"] == EVENT["t0"] and fixed.result.n_params == wf.result.n_params - 1
    with pytest.raises(ParameterError, match="free event parameters"):
        fit_white(inputs, flux, var, model, EVENT, free=("period",))


def test_white_light_errors_are_honest():
    # Monte Carlo (common practice): over 30 noise draws the scatter of the fitted
    # depth and mid-time matches the errors the fit reports, which are marginalised
    # over the free mid-time through the Jacobian.  With 30 draws the sample standard
    # deviation has a relative error of 13 %; tolerance 0.65-1.35.
    inputs = _inputs()
    model = parse_model("visit1+orbit1").systematics()
    depth, t0, err_d, err_t = [], [], [], []
    for seed in range(30):
        flux, var = _white_curve(inputs, np.random.default_rng(seed), shift=1 * MIN)
        # no ramp in the data for this model: keep the first exposure of each orbit out
        wf = fit_white(inputs, flux, var, model, EVENT, mask=inputs.orbit_time < 20 * MIN)
        depth.append(wf.result.depth)
        t0.append(wf.event["t0"])
        err_d.append(wf.result.depth_error)
        err_t.append(wf.event_errors["t0"])
    assert 0.65 < np.std(depth) / np.mean(err_d) < 1.35, (np.std(depth), np.mean(err_d))
    assert 0.65 < np.std(t0) / np.mean(err_t) < 1.35, (np.std(t0), np.mean(err_t))


def test_linearisation_reproduces_the_fit_covariance():
    # The Jacobian rebuilt at the solution gives the depth variance of fit_event's own
    # covariance (same least-squares algebra, Berta et al. 2012 model), with and
    # without the planet's flux hidden by an eclipse; with shape derivatives it gives
    # the fit's marginalised error.
    inputs = _inputs()
    model = parse_model("visit1+orbit1+ramp").systematics()
    flux, var = _white_curve(inputs, np.random.default_rng(3))
    tmpl = event_template(inputs.time, EVENT)
    d = model.design(inputs, {"ramp.tau": TAU})
    for derivs in (None, d.derivatives):
        res = fit_event(flux, var, tmpl, d.columns, basis_derivatives=derivs)
        lin = linearise_fit(res, d.columns, tmpl, var, basis_derivatives=derivs)
        assert np.sqrt(lin.depth_variance(prior=False)) == pytest.approx(
            res.depth_error_unscaled, rel=1e-6)
        # the weak prior on the time scale (e**2 wide) hardly moves a constrained one
        assert np.sqrt(lin.depth_variance()) == pytest.approx(res.depth_error_unscaled, rel=0.02)
        assert lin.depth_variance() <= lin.depth_variance(prior=False) * (1 + 1e-9)
    eclipse = dict(EVENT, kind="eclipse", t0=EVENT["t0"] - 0.5 * EVENT["period"])
    tmpl = event_template(inputs.time, eclipse)
    planet = tied_phase_curve(inputs.time, eclipse["t0"], EVENT["period"])
    fl = flux * (1 + 1e-3 * (1 - tmpl))
    res = fit_event(fl, var, tmpl, d.columns, **planet)
    lin = linearise_fit(res, d.columns, tmpl, var, planet_basis=planet["planet_basis"],
                        planet_at_event=planet["planet_at_event"])
    assert np.sqrt(lin.depth_variance()) == pytest.approx(res.depth_error_unscaled, rel=1e-6)
    errs = depth_errors(res, lin, fl, n_shifts=30)
    assert errs.n_shifts == 30 and np.isfinite(errs.permutation) and errs.beta >= errs.covariance
    assert errs.pick("largest") == max(errs.covariance, errs.beta, errs.permutation)
