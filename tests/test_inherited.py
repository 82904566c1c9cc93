"""Errors a channel inherits from the white light curve it is tied to.

Sources: the propagation of errors through a linear least-squares estimator
(common practice: the estimate is linear in the data, so its response to a
change of the data is exact) and Monte Carlo over noise draws (common
practice; STYLE.md 7); common-mode correction as in Berta et al. 2012 and
Kreidberg et al. 2014 (channels divided by the white light's systematics).
"""

from types import SimpleNamespace

import numpy as np
import pytest

from lightledger.pipeline.eventfit import fit_event
from lightledger.pipeline.fiterrors import depth_response, linearise_fit
from lightledger.pipeline.inherited import inherited_error

N = 90
T = np.linspace(-0.5, 0.5, N)
S_TEMPLATE = (np.abs(T) < 0.18).astype(float)          # a box event, unit depth


def test_depth_response_is_exact_for_a_linear_fit():
    # A fit with the depth's template fixed is linear in the data (it converges to
    # the least-squares solution), so a change of the data moves the depth by
    # exactly h . change, h = g^T (J^T W J)^-1 J^T W.
    rng = np.random.default_rng(3)
    basis = np.column_stack([T, T ** 2])
    flux = 1e5 * (1 + 0.01 * T - 0.02 * T ** 2) * (1 - 0.01 * S_TEMPLATE)
    var = np.full(N, 1e5)
    flux = flux + rng.normal(0, np.sqrt(var))
    res = fit_event(flux, var, S_TEMPLATE, basis)
    h = depth_response(linearise_fit(res, basis, S_TEMPLATE, var))
    change = rng.normal(0, 30.0, N)
    moved = fit_event(flux + change, var, S_TEMPLATE, basis)
    assert abs((moved.depth - res.depth) - h @ change) < 1e-3 * abs(moved.depth - res.depth)


def _fit_pair(rng, sigma_white, sigma_chan):
    """White light and one channel sharing a curved systematic; the channel divided by
    the white's fitted systematics (cm-sys) and fitted with a constant and the depth."""
    sys_true = 1 + 0.004 * T - 0.015 * T ** 2
    wbasis = np.column_stack([T, T ** 2])
    fw = 1e6 * sys_true * (1 - 0.010 * S_TEMPLATE)
    fc = 1e5 * sys_true * (1 - 0.012 * S_TEMPLATE)
    vw = (sigma_white * 1e6) ** 2 * np.ones(N)
    vc = (sigma_chan * 1e5) ** 2 * np.ones(N)
    fw = fw + rng.normal(0, np.sqrt(vw))
    fc = fc + rng.normal(0, np.sqrt(vc))
    rw = fit_event(fw, vw, S_TEMPLATE, wbasis)
    g = rw.systematics / np.mean(rw.systematics)
    y, v = fc / g, vc / g ** 2
    rc = fit_event(y, v, S_TEMPLATE, None)
    lc = linearise_fit(rc, np.zeros((N, 0)), S_TEMPLATE, v)
    white = SimpleNamespace(linearisation=linearise_fit(rw, wbasis, S_TEMPLATE, vw), result=rw,
                            event_errors={}, shapes={})
    inh = inherited_error(rc, lc, S_TEMPLATE, T, {}, (0.0, 0.0), white, white, "sys",
                          lambda shapes: rc.depth, [])
    return rc.depth, rc.depth_error, inh


def test_common_mode_error_matches_monte_carlo():
    # The white light's curvature trades with its depth; a channel divided by the
    # white's fitted systematics inherits that error.  Over 300 noise draws the
    # channel depth scatters as sqrt(own^2 + inherited^2) (within 12%: the sample
    # standard deviation of 300 draws is good to 4%), and clearly more than its
    # own conditional error says.
    rng = np.random.default_rng(11)
    out = np.array([_fit_pair(rng, 4e-4, 4e-4) for _ in range(300)])
    depth, own, inh = out.T
    scatter = np.std(depth)
    total = np.median(np.sqrt(own ** 2 + inh ** 2))
    assert abs(scatter / total - 1) < 0.12, (scatter, total, np.median(own), np.median(inh))
    assert scatter > 1.3 * np.median(own), (scatter, np.median(own))


def test_an_unconstrained_time_scale_adds_a_bounded_error():
    # A time scale the light curve cannot tell (its column a hair from the event's)
    # would extrapolate the depth's error linearly over many e-folds; the linearised
    # errors hold each time scale within SHAPE_LOG_PRIOR (in its logarithm) of its
    # value, the Gaussian-prior (Laplace) covariance (J^T W J + P)^-1 (common
    # practice), computed here independently with numpy's inverse.
    from lightledger.pipeline.fiterrors import SHAPE_LOG_PRIOR, FitLinearisation
    rng = np.random.default_rng(2)
    ones = np.ones(N)
    depth_col = -S_TEMPLATE
    shape_col = 0.5 * depth_col + 1e-9 * rng.standard_normal(N)
    J = np.column_stack([ones, depth_col, shape_col])
    w = np.full(N, 1e4)
    lin = FitLinearisation(jacobian=J, parameters=np.zeros(3), depth_gradient=np.array([0, 1, 0.]),
                           weights=w, fitted=np.ones(N, bool), blocks=(1, 1, 1, 0))
    info = J.T @ (w[:, None] * J) + np.diag([0, 0, SHAPE_LOG_PRIOR ** -2])
    expect = np.linalg.inv(info)[1, 1]
    assert lin.depth_variance() == pytest.approx(expect, rel=1e-6)
    # the shape moves the model like half a unit of depth: at most 0.5 * prior more
    cond = 1 / (depth_col @ (w * depth_col) - (ones @ (w * depth_col)) ** 2 / w.sum())
    assert lin.depth_variance() < cond + (0.5 * SHAPE_LOG_PRIOR) ** 2
    assert lin.depth_variance(prior=False) > 1e3 * lin.depth_variance()


def test_shape_refits_reproduce_first_order_propagation():
    # For a depth linear in the shapes' logarithms, d = g . ln(theta / theta0), the
    # refits along the covariance's principal directions give g^T C g exactly (the
    # propagation of errors, common practice), correlations included.
    from lightledger.pipeline.inherited import _shape_variance
    names = ("a.fill0", "a.release0", "a.fill1")
    shapes = {"a.fill0": 300.0, "a.release0": 900.0, "a.fill1": 4000.0, "event.t0": 0.1}
    g = np.array([40e-6, -25e-6, 10e-6])
    sd = np.array([0.3, 0.2, 0.4])
    corr = np.array([[1.0, -0.8, 0.3], [-0.8, 1.0, -0.1], [0.3, -0.1, 1.0]])
    cov = corr * np.outer(sd, sd)

    def depth(values):
        assert values["event.t0"] == 0.1            # what is not a shape stays
        return 0.01 + g @ np.log([values[n] / shapes[n] for n in names])

    assert _shape_variance(cov, shapes, names, depth) == pytest.approx(g @ cov @ g, rel=1e-9)


def test_correlated_shapes_move_together_in_the_refits():
    # Two time scales the white light measures mostly through one combination (a
    # fill and a release time trading against each other), one of them loosely
    # (its error beyond the cap of MAX_SHAPE_LOG_ERROR).  A channel depth linear in
    # the well-measured combination has the exact variance g^T C g (propagation of
    # errors, common practice).  Moving each shape alone by its capped error moves
    # them by different fractions of their errors, off the correlated direction the
    # white light allows, and overstates it; moving them along the principal
    # directions, shortened together, does not (a capped move can only understate).
    from lightledger.pipeline.inherited import MAX_SHAPE_LOG_ERROR, _shape_variance
    names = ("t.fill0", "t.release0")
    shapes = {"t.fill0": 300.0, "t.release0": 3000.0}
    sd = np.array([0.3, 2.0])
    rho = 0.99
    cov = np.array([[1.0, rho], [rho, 1.0]]) * np.outer(sd, sd)
    b = 50e-6
    g = b * np.array([1 / sd[0], -1 / sd[1]])

    def depth(values):
        return g @ np.log([values[n] / shapes[n] for n in names])

    exact = g @ cov @ g
    var = _shape_variance(cov, shapes, names, depth)
    assert 0.5 * exact < var <= exact * (1 + 1e-9)
    step = np.minimum(sd, MAX_SHAPE_LOG_ERROR)
    delta = np.array([depth({**shapes, n: shapes[n] * np.exp(step[k])})
                      - depth({**shapes, n: shapes[n] * np.exp(-step[k])})
                      for k, n in enumerate(names)]) / 2
    alone = delta @ (cov / np.outer(sd, sd)) @ delta
    assert alone > 5 * exact
