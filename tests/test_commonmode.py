"""Common modes divided out of the channels (lightledger.pipeline.commonmode).

Sources: the divide-white correction, a spectroscopic channel divided by the
white light curve over its fitted event model (Berta et al. 2012; Kreidberg
et al. 2014): achromatic systematics cancel exactly; the variance of a ratio
of correlated quantities to first order (propagation of errors, common
practice), checked against a Monte Carlo (STYLE.md 7); marginalisation over
models with information-criterion weights (Wakeford et al. 2016), computed by
hand on a noise-free case.
"""

from types import SimpleNamespace

import numpy as np
import pytest

from lightledger.pipeline.commonmode import common_mode_choice, common_modes, divide_common_mode
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.eventfit import fit_event

N = 120
T = np.linspace(-0.1, 0.1, N)
BOX = (np.abs(T) < 0.03).astype(float)                   # unit-depth event shape
RAMP = 1 - 0.004 * np.exp(-(T - T[0]) / 0.01)            # achromatic settling ramp
TREND = 1 + 0.02 * T


def test_divide_white_removes_achromatic_systematics_exactly():
    # Noise-free white light and channel share the ramp and trend; the white light
    # is fitted WITHOUT the ramp (its residuals hold it).  Dividing the channel by
    # the white light over its fitted event model cancels every achromatic
    # systematic, whatever the white light's model missed (Berta et al. 2012): in
    # the event the channel keeps (1 - 0.013) (1 - d_w) / (1 - 0.010), d_w the
    # white light's fitted depth, i.e. only the white light's depth error passes on
    # (what pipeline/inherited.py adds to the channel's error).
    white = 1e6 * RAMP * TREND * (1 - 0.010 * BOX)
    chan = 1e5 * RAMP * TREND * (1 - 0.013 * BOX)
    res_w = fit_event(white, np.full(N, 1e6), BOX, T[:, None])
    assert abs(res_w.depth - 0.010) > 1e-5            # the white light's own depth is off
    g = common_modes(res_w, white)
    y, v = divide_common_mode(chan, np.full(N, 1e5), g["res"], kind="res", white_flux=white,
                              white_variance=np.full(N, 1e6), share=0.1)
    res = fit_event(y, v, BOX, None)
    expect = 1 - (1 - 0.013) * (1 - res_w.depth) / (1 - 0.010)
    assert res.depth == pytest.approx(expect, rel=1e-9)
    assert np.allclose(res.detrended_flux[BOX == 0], 1.0, atol=1e-12)   # nothing else is left
    # the white light's fitted systematics lack the ramp, which stays in the channel
    y, v = divide_common_mode(chan, np.full(N, 1e5), g["sys"], kind="sys")
    left = fit_event(y, v, BOX, None)
    assert np.max(np.abs(left.detrended_flux[BOX == 0] - 1.0)) > 1e-4
    assert np.mean(g["res"]) == pytest.approx(1.0) and np.mean(g["sys"]) == pytest.approx(1.0)


def test_common_modes_leave_the_planet_out():
    # For an eclipse fitted with the planet's own flux, "sys" is the star times the
    # systematics (``star``), not the out-of-eclipse flux with the planet.
    star = np.linspace(1.0, 1.01, 5)
    result = SimpleNamespace(star=star, systematics=star * 1.002, model=star * 1.001)
    g = common_modes(result, star * 1.001)
    assert np.allclose(g["sys"], star / star.mean())
    assert np.allclose(g["res"], star / star.mean())


@pytest.mark.parametrize("share", [1.0, 0.0])
def test_ratio_variance_matches_monte_carlo(share):
    # A channel inside (share 1) or outside (share 0) a white band of four channels;
    # the white light is the sum of the band's channels, so their noise is shared.
    rng = np.random.default_rng(4)
    levels = np.array([4e4, 3e4, 2e4, 1e4])
    n_draw = 40000
    draws = levels + rng.standard_normal((n_draw, 4)) * np.sqrt(levels)
    if share == 1.0:
        chan, var = draws[:, 1], levels[1]
        white, wvar = draws.sum(axis=1), levels.sum()
    else:
        chan, var = draws[:, 0], levels[0]
        white, wvar = draws[:, 1:].sum(axis=1), levels[1:].sum()
    g = white / np.mean(white)
    y, _ = divide_common_mode(chan, var, g, kind="res", white_flux=white, white_variance=wvar,
                              share=share)
    _, v = divide_common_mode(np.array([levels[1] if share else levels[0]]), var,
                              np.array([1.0]), kind="res", white_flux=np.array([wvar]),
                              white_variance=wvar, share=share)
    # the Monte Carlo variance of y is known to sqrt(2/n) ~ 0.7 %; allow 3 %
    assert np.var(y) == pytest.approx(v[0], rel=0.03)
    # the naive variance var/g^2 is wrong by the shared photons (or the white's noise)
    naive = var / np.mean(g) ** 2
    assert abs(naive / np.var(y) - 1) > 0.1


def test_validation():
    with pytest.raises(ParameterError, match="kind"):
        divide_common_mode(np.ones(3), np.ones(3), np.ones(3), kind="white")
    with pytest.raises(ParameterError, match="white_flux"):
        divide_common_mode(np.ones(3), np.ones(3), np.ones(3), kind="res")
    with pytest.raises(ParameterError, match="share"):
        divide_common_mode(np.ones(3), np.ones(3), np.ones(3), kind="res", white_flux=np.ones(3),
                           white_variance=np.ones(3), share=2.0)


def test_common_mode_choice_marginalises_over_the_white_models():
    # Two white models whose common modes differ by a box-shaped dip of 0.002 and
    # 0.005 (a model that took part of the event into its systematics), weighted 0.7
    # and 0.3.  Noise-free, a channel (1 - 0.012 s) divided by 1 - a s and fitted with
    # a constant and a depth has in-event level (1 - 0.012)/(1 - a) exactly, so
    # d_k = 1 - 0.988/(1 - a_k); the marginalised depth is sum w d and the spread
    # sum w (d - mean)^2 (Wakeford et al. 2016), computed here by hand.
    flux = 5e4 * TREND * (1 - 0.012 * BOX)
    var = np.full(N, 5e4)
    alts = [(0.7, 1 - 0.002 * BOX), (0.3, 1 - 0.005 * BOX)]

    def fit_depth(y, v):
        return fit_event(y, v, BOX, T[:, None]).depth

    mean, spread = common_mode_choice(flux, var, alts, fit_depth, kind="sys")
    d = 1 - 0.988 / (1 - np.array([0.002, 0.005]))
    w = np.array([0.7, 0.3])
    assert mean == pytest.approx(np.sum(w * d), rel=1e-6)
    assert spread == pytest.approx(np.sum(w * (d - np.sum(w * d)) ** 2), rel=1e-4)
    # weights are normalised; one model alone has no spread; a failed refit drops out
    assert common_mode_choice(flux, var, [(2.0, alts[0][1]), (2.0, alts[0][1])], fit_depth,
                              kind="sys") == pytest.approx((d[0], 0.0), abs=1e-12)
    calls = iter([fit_depth, lambda y, v: np.nan])
    mean, spread = common_mode_choice(flux, var, alts, lambda y, v: next(calls)(y, v), kind="sys")
    assert (mean, spread) == pytest.approx((d[0], 0.0), abs=1e-12)
