"""Tests of the declarative systematics model and the shape-parameter search."""

from dataclasses import dataclass

import batman
import numpy as np
import pytest

from lightledger.pipeline.covariates import exposure_covariates
from lightledger.pipeline.detrend import detrend_light_curve, fit_light_curve
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.eventshapes import transit_template
from lightledger.pipeline.systematics import (Block, OrbitRamp, ShapeParam, SystematicsInputs,
                                              SystematicsModel, VisitPolynomial, polynomial_basis,
                                              standard_model)

MIN = 1.0 / 1440.0
T0 = 2461000.2


def _visit(n_orbits=4, cadence_min=1.5):
    """Mid times of a low-Earth-orbit visit (96 min orbits, 50 min visible: REFERENCES.md,
    facts of the trade, common practice), centred on T0, and its covariates."""
    start = np.concatenate([o * 96 * MIN + np.arange(0, 50, cadence_min) * MIN
                            for o in range(n_orbits)])
    start = start - 0.5 * (start[0] + start[-1]) + T0 - 0.25 * MIN
    mid = start + 0.5 * MIN
    return mid, exposure_covariates(start, mid)


def _transit(t):
    """batman's transit (Kreidberg 2015), the reference library."""
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc = T0, 2.8, 0.12, 8.0, 86.0
    p.ecc, p.w, p.u, p.limb_dark = 0.0, 90.0, [0.2, 0.2], "quadratic"
    return batman.TransitModel(p, t).light_curve(p)


@dataclass(frozen=True)
class VisitExponential:
    """A component written outside the package: a visit-long exponential with its own
    time scale, exp(-(t - t_first) / scale), derivative with respect to ln(scale)."""

    grid: tuple
    label: str = "hook"

    @property
    def shapes(self):
        return (ShapeParam("scale", self.grid, refine=True),)

    def block(self, inputs, shape):
        dt = inputs.time - inputs.time[0]
        col = np.exp(-dt / shape["scale"])[:, None]
        return Block(col, (self.label,), (col * (dt / shape["scale"])[:, None],))


def test_standard_model_matches_keyword_detrend():
    # The keyword options of detrend_light_curve describe standard_model(); fitting
    # that model through fit_light_curve gives the same numbers (same computation).
    t, cov = _visit()
    s = transit_template(_transit(t))
    rng = np.random.default_rng(2)
    flux = 1e6 * (1 + 1e-3 * polynomial_basis(t, 1)[:, 0]) * (1 - 0.0144 * s)
    flux = flux + 300 * rng.normal(size=t.size)
    var = np.full(t.size, 9e4)
    inputs = SystematicsInputs(t, orbit=cov.orbit, orbit_time=cov.orbit_time)
    model = standard_model(visit_order=1, orbit_order=1, ramp=True)
    a = fit_light_curve(inputs, flux, var, s, model)
    b = detrend_light_curve(t, flux, var, s, orbit=cov.orbit, orbit_time=cov.orbit_time,
                            visit_order=1, orbit_order=1, ramp=True)
    assert a.depth == b.depth and a.depth_error == b.depth_error and a.tau == b.tau
    assert a.shapes == (("ramp.tau", a.tau),)
    assert [type(c).__name__ for c in model.components] == ["VisitPolynomial",
                                                            "OrbitPolynomial", "OrbitRamp"]


def test_custom_component_and_two_shape_parameters_recover_systematics():
    # Defining property (STYLE.md item 9): a noise-free transit times systematics of the
    # model's own form is recovered exactly (1e-7), with two shape parameters (a
    # per-orbit ramp on a grid, a visit exponential refined between grid values) found
    # by the coordinate search.
    t, cov = _visit()
    model_flux = _transit(t)
    s = transit_template(model_flux)
    depth = 1 - model_flux.min()
    dt = t - t[0]
    amp = np.array([4e-3, 1.5e-3, 1.2e-3, 1.0e-3])[cov.orbit]
    S = 2e6 * (1 + 2e-3 * np.exp(-dt / 0.05) - amp * np.exp(-cov.orbit_time / (6 * MIN)))
    flux = S * model_flux
    inputs = SystematicsInputs(t, orbit=cov.orbit, orbit_time=cov.orbit_time)
    model = SystematicsModel((VisitExponential(grid=(0.02, 0.04, 0.08, 0.16)),
                              OrbitRamp(tau_grid=(3 * MIN, 6 * MIN, 12 * MIN))))
    res = fit_light_curve(inputs, flux, flux.copy(), s, model)
    values = dict(res.shapes)
    assert values["ramp.tau"] == pytest.approx(6 * MIN)
    assert values["hook.scale"] == pytest.approx(0.05, rel=1e-4)
    assert res.depth == pytest.approx(depth, abs=1e-7)
    assert res.n_params == 1 + 1 + 4 + 1 + 2   # constant, hook, ramps, depth, two shapes
    assert res.coefficient_names[:3] == ("constant", "hook", "ramp[0]")


def test_model_inputs_are_checked():
    # Validation at the boundary: a component that needs a missing input says which.
    t, _ = _visit(n_orbits=2)
    inputs = SystematicsInputs(t)
    with pytest.raises(ParameterError, match="orbit_time is needed .* ramp"):
        standard_model(ramp=True).design(inputs, {"ramp.tau": 0.004})
    with pytest.raises(ParameterError, match="ramp.tau"):
        standard_model(ramp=True).design(SystematicsInputs(t, orbit=np.zeros(t.size, int),
                                                           orbit_time=t - t[0]))
    with pytest.raises(ParameterError, match="orbit must have shape"):
        SystematicsInputs(t, orbit=np.zeros(3, int))
    d = SystematicsModel((VisitPolynomial(2),)).design(inputs)
    assert d.names == ("visit^1", "visit^2") and d.derivatives.shape == (0, t.size, 2)
