"""Tests of lightledger.pipeline.components and lightledger.pipeline.modelspec."""

from dataclasses import replace

import numpy as np
import pytest

from lightledger.pipeline.components import (Decorrelation, TiedOrbitRamp, TrapRamp,
                                             VisitExponential)
from lightledger.pipeline.detrend import fit_light_curve
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.eventshapes import transit_template
from lightledger.pipeline.modelspec import (DEFAULT_SCAN_GRID, DEFAULT_STARE_GRID, parse_grid,
                                            parse_model)
from lightledger.pipeline.systematics import (OrbitPolynomial, OrbitRamp, ScanOffset,
                                              SystematicsInputs, SystematicsModel,
                                              VisitPolynomial)
from lightledger.pipeline.traps import TrapPopulation, trap_history, trap_ramp_basis
from lightledger.pipeline.transit import transit_flux

MIN = 1.0 / 1440.0
T0 = 2460500.3
TEXP = 80.0


def _visit(n_orbits=4, per_orbit=14):
    """A low-Earth-orbit visit: 96-min orbits, 50 min visible (REFERENCES.md, facts of the
    trade), exposures of 80 s every 3.5 min, centred on T0."""
    start = np.concatenate([o * 96 * MIN + np.arange(per_orbit) * 3.5 * MIN for o in range(n_orbits)])
    start = start - 0.5 * (start[0] + start[-1]) + T0
    mid = start + 0.5 * TEXP / 86400
    orbit = np.repeat(np.arange(n_orbits), per_orbit)
    first = np.array([start[orbit == o][0] for o in orbit])
    return mid, orbit, mid - first


def _inputs(rate=300.0):
    mid, orbit, ot = _visit()
    n = mid.size
    rng = np.random.default_rng(2)
    cov = {"dx": 0.05 * rng.standard_normal(n), "dy": 0.03 * rng.standard_normal(n),
           "exposure_time": np.full(n, TEXP), "exposure_start": (mid - mid[0]) * 86400.0,
           "trap_rate": np.full(n, rate)}
    return SystematicsInputs(mid, orbit=orbit, orbit_time=ot,
                             scan_direction=np.where(np.arange(n) % 2, -1.0, 1.0), covariates=cov)


def _transit(mid):
    """Mandel & Agol 2002 transit of the reducer's transit model (tested against batman in
    tests/test_transit.py)."""
    return transit_flux(mid, t0=T0, period=2.7, rp_rs=0.12, a_rs=9.0, inclination=87.5,
                        u1=0.2, u2=0.25)


@pytest.mark.parametrize("comp", [VisitExponential(), TiedOrbitRamp("shared"),
                                  TiedOrbitRamp("first"),
                                  TrapRamp(reference_rate=300.0, populations=2)])
def test_shape_derivatives_match_finite_differences(comp):
    # The derivative of each column with respect to the logarithm of each shape
    # parameter (what the fits use to carry the shapes' uncertainty into the
    # covariance) against a central difference of step 1e-4 in the logarithm
    # (truncation error ~1e-8 relative; tolerance 1e-5 of the largest entry).
    inputs = _inputs()
    shapes = {sp.name: float(np.median(sp.grid)) for sp in comp.shapes}
    block = comp.block(inputs, shapes)
    assert len(block.derivatives) == len(comp.shapes)
    for sp, d in zip(comp.shapes, block.derivatives):
        up = comp.block(inputs, {**shapes, sp.name: shapes[sp.name] * np.exp(1e-4)}).columns
        dn = comp.block(inputs, {**shapes, sp.name: shapes[sp.name] * np.exp(-1e-4)}).columns
        fd = (up - dn) / 2e-4
        np.testing.assert_allclose(d, fd, rtol=0, atol=1e-5 * max(np.abs(fd).max(), 1e-12))


def test_deferred_trap_derivatives_are_made_when_read_and_pickled():
    # The trap ramp defers its derivatives (a shape search reads only the
    # columns): a design made from it gives the same derivatives as its
    # block, stacked in the model's columns, and a pickled design (a fit sent
    # between worker processes) carries them made.
    import pickle
    inputs = _inputs()
    comp = TrapRamp(reference_rate=300.0, populations=2)
    model = SystematicsModel((VisitPolynomial(1), comp))
    shapes = {f"trap.{sp.name}": float(np.median(sp.grid)) for sp in comp.shapes}
    design = model.design(inputs, shapes)
    block = comp.block(inputs, {k.split(".")[1]: v for k, v in shapes.items()})
    assert design.shape_names == tuple(shapes)
    again = pickle.loads(pickle.dumps(design))
    for d in (design.derivatives, again.derivatives):
        assert d.shape == (4, inputs.n, 3)
        np.testing.assert_array_equal(d[:, :, 0], 0.0)
        np.testing.assert_array_equal(d[:, :, 1:], np.stack(block.derivatives))


def test_tied_ramps_span_the_per_orbit_ramps():
    # One shared amplitude is the sum of the per-orbit columns; "first" splits off the
    # first orbit (Kreidberg et al. 2014 ramps, amplitudes tied between orbits).
    inputs = _inputs()
    tau = 6 * MIN
    each = OrbitRamp().block(inputs, {"tau": tau}).columns
    shared = TiedOrbitRamp("shared").block(inputs, {"tau": tau}).columns
    first = TiedOrbitRamp("first").block(inputs, {"tau": tau}).columns
    np.testing.assert_allclose(shared[:, 0], each.sum(axis=1), rtol=1e-14)
    np.testing.assert_allclose(first[:, 0], each[:, 0], rtol=1e-14)
    np.testing.assert_allclose(first[:, 1], each[:, 1:].sum(axis=1), rtol=1e-14)
    with pytest.raises(ParameterError, match="shared' or 'first"):
        TiedOrbitRamp("each")


def test_trap_ramp_light_curve_is_recovered_exactly():
    # Defining property (STYLE.md item 9): a noise-free transit (Mandel & Agol 2002)
    # times a charge-trapping ramp of the published equations (Zhou et al. 2017,
    # via trap_history, tested against a hand computation) is fitted exactly by the
    # trapping component when its fill and release times lie on the grids: depth to
    # 1e-9 and a flat detrended light curve out of transit.
    inputs = _inputs(rate=320.0)
    mid = inputs.time
    pops = [TrapPopulation(150.0, 0.008, 400.0), TrapPopulation(1300.0, 0.011, 15000.0)]
    frac = trap_history(np.full(mid.size, 320.0), inputs.covariates["exposure_start"], TEXP, pops,
                        orbit=inputs.orbit).recorded_fraction[:, 0]
    transit = _transit(mid)
    flux = 4.0e7 * frac * transit
    fills = [1.0 / (p.trap_constant * 320.0) for p in pops]
    comp = TrapRamp(reference_rate=320.0, populations=2,
                    fill_grids=((fills[0] * 0.5, fills[0], fills[0] * 2),
                                (fills[1] * 0.5, fills[1], fills[1] * 2)),
                    release_grids=((200.0, 400.0, 800.0), (7500.0, 15000.0, 30000.0)))
    model = SystematicsModel((comp,))
    s = transit_template(transit)
    res = fit_light_curve(inputs, flux, np.full(mid.size, 4.0e7), s, model)
    shapes = dict(res.shapes)
    assert shapes["trap.fill0"] == pytest.approx(fills[0]) and shapes["trap.release1"] == 15000.0
    assert res.depth == pytest.approx(1 - transit.min(), rel=1e-9)
    out = s == 0
    np.testing.assert_allclose(res.detrended_flux[out], 1.0, atol=1e-10)
    # the efficiencies come back as the coefficients of the loss columns
    coef = dict(zip(res.coefficient_names, res.coefficients / res.coefficients[0]))
    assert -coef["trap0"] == pytest.approx(0.008, rel=1e-7)
    assert -coef["trap1"] == pytest.approx(0.011, rel=1e-7)


def test_trap_columns_are_the_efficiency_columns_of_the_basis():
    inputs = _inputs()
    comp = TrapRamp(reference_rate=300.0, populations=1)
    block = comp.block(inputs, {"fill0": 100.0, "release0": 500.0})
    ref = trap_ramp_basis(np.full(inputs.n, 300.0), inputs.covariates["exposure_start"], TEXP,
                          [1 / (100.0 * 300.0)], [500.0], orbit=inputs.orbit)
    np.testing.assert_allclose(block.columns[:, 0], ref.columns[:, 0, 0], rtol=1e-14)
    assert block.names == ("trap0",)


def test_decorrelation_recovers_a_linear_dependence():
    # Common practice (decorrelation against the spectrum's position): a light curve
    # linear in dx and dy is fitted exactly; columns are standardised.
    inputs = _inputs()
    block = Decorrelation(("dx", "dy")).block(inputs, {})
    np.testing.assert_allclose(block.columns.mean(axis=0), 0, atol=1e-14)
    np.testing.assert_allclose(block.columns.std(axis=0), 1, rtol=1e-12)
    transit = _transit(inputs.time)
    dx, dy = inputs.covariates["dx"], inputs.covariates["dy"]
    flux = 1e6 * (1 + 0.01 * dx - 0.02 * dy) * transit
    model = SystematicsModel((Decorrelation(("dx", "dy")),))
    res = fit_light_curve(inputs, flux, np.full(inputs.n, 1e6), transit_template(transit), model)
    assert res.depth == pytest.approx(1 - transit.min(), rel=1e-4)
    with pytest.raises(ParameterError, match="width is needed"):
        Decorrelation(("width",)).block(inputs, {})


def test_model_strings():
    spec = parse_model("scan + ramp + Visit1 + orbit2 + dy + dx")
    assert spec.name == "visit1+orbit2+scan+ramp+dx+dy"
    assert spec.families == {"exponential ramp", "decorrelation"}
    comps = spec.systematics().components
    assert [type(c) for c in comps] == [VisitPolynomial, OrbitPolynomial, ScanOffset, OrbitRamp,
                                        Decorrelation]
    # a stare has no orbit phase and no scan directions
    assert [type(c) for c in spec.systematics(stare=True).components] == [VisitPolynomial, OrbitRamp,
                                                                           Decorrelation]
    cm = parse_model("cm-res+visit1+scan")
    assert cm.common_mode == "res" and cm.white_name == "visit1+scan"
    assert parse_model("traps1").systematics(reference_rate=100.0).components[0].populations == 1
    with pytest.raises(ParameterError, match="did you mean 'scan'"):
        parse_model("visit1+scna")
    with pytest.raises(ParameterError, match="two visit-trend tokens"):
        parse_model("visit1+visit2")
    with pytest.raises(ParameterError, match="reference rate"):
        parse_model("traps").systematics()
    with pytest.raises(ParameterError, match="repeats the model"):
        parse_grid(["visit1+scan", "scan+visit1"])
    assert len(parse_grid(DEFAULT_SCAN_GRID)) == len(DEFAULT_SCAN_GRID)
    assert len(parse_grid(DEFAULT_STARE_GRID)) == len(DEFAULT_STARE_GRID)


def _band_visit(spread, seed=0):
    """A band of 40 columns whose rates per pixel spread by ``spread`` (log-spaced, mean 300
    e-/s), each trapping at its own rate (Zhou et al. 2017 via trap_history), in 10 channels
    of 4 columns; noise-free white and channel light curves of an achromatic transit."""
    from lightledger.pipeline.grid import Curves

    inputs = _inputs()
    mid = inputs.time
    transit = _transit(mid)
    base = np.geomspace(1.0, spread, 40)
    base = base / base.mean() * 300.0
    pops = [TrapPopulation(150.0, 0.008, 400.0), TrapPopulation(1300.0, 0.011, 15000.0)]
    col_rate = transit[:, None] * base[None, :]
    frac = trap_history(col_rate, inputs.covariates["exposure_start"], TEXP, pops,
                        orbit=inputs.orbit).recorded_fraction
    electrons = col_rate * frac * TEXP                       # recorded, per column and pixel
    chan = electrons.reshape(mid.size, 10, 4).sum(axis=2)
    white = chan.sum(axis=1)
    # 100 ppm per exposure in the white light, shared out as photon noise
    var = 1e-8 * white[:, None] * chan
    ch_rate = transit[:, None] * base.reshape(10, 4).mean(axis=1)[None, :]
    share = np.median(chan, axis=0) / np.median(white)
    bad = inputs.orbit == 0
    white_rate = transit * base.mean()
    curves = dict(inputs=inputs, white_flux=white, white_variance=var.sum(axis=1), white_mask=bad,
                  flux=chan, variance=var, mask=np.repeat(bad[:, None], 10, axis=1),
                  white_rate=white_rate, rate=ch_rate)
    return Curves, curves, (ch_rate, share)


def test_band_of_pixels_trapping_at_their_own_rates_is_recovered():
    # Noise-free truth recovery: a band whose columns' rates spread tenfold (a spectrum's
    # columns), each column trapping at its own rate by the published equations (Zhou et
    # al. 2017, via trap_history, tested against a hand computation in test_traps.py),
    # fitted by the grid's charge-trapping member at 100 ppm per exposure.  Described as
    # its channels' ramps at their own rates with shared detector constants, the band is
    # fitted to a small fraction of the noise (chi-square < 0.1 over 42 exposures) and the
    # white depth comes back within a quarter of its error, every channel's (fitted at the
    # white light's time scales with its own rate) within half of its error.  Described by
    # one mean rate, the same band leaves a misfit (chi-square > 0.3): the sum of ramps at
    # different fill rates is not the ramp of their mean.
    from lightledger.pipeline.grid import fit_grid

    Curves, kw, parts = _band_visit(10.0)
    event = dict(kind="transit", t0=T0, period=2.7, rp_rs=0.12, a_rs=9.0, inclination=87.5,
                 u1=0.2, u2=0.25, duration=0.1)
    specs = parse_grid(["visit1+traps"])
    rp2 = event["rp_rs"] ** 2            # the fitted depth is the transit model's (rp/rs)^2
    grid = fit_grid(specs, Curves(**kw, white_parts=parts), event, free=(), n_shifts=0,
                    reference_rate=300.0)
    pulls = (grid.depth[0] - rp2) / grid.error[0]
    assert grid.chi2[0, 0] < 0.1, grid.chi2[0, 0]
    assert abs(pulls[0]) < 0.25, np.round(pulls, 3)
    assert np.all(np.abs(pulls[1:]) < 0.5), np.round(pulls, 3)
    one = fit_grid(specs, Curves(**kw), event, free=(), n_shifts=0, reference_rate=300.0)
    assert one.chi2[0, 0] > 0.3, one.chi2[0, 0]


def test_trap_limits_and_band_parts_validation():
    # The time scales the exposures can tell apart (see TrapRamp.limits): fill times from
    # the shortest exposure to the visit's span, release times from the shortest interval
    # between exposure starts (3.5 min here) to ten spans; masked exposures do not count.
    inputs = _inputs()
    start = inputs.covariates["exposure_start"]
    comp = TrapRamp(reference_rate=300.0, populations=2)
    span = start[-1] + TEXP - start[0]
    lim = comp.limits(inputs)
    assert lim["trap.fill1"] == pytest.approx((TEXP, span))
    assert lim["trap.release0"] == pytest.approx((210.0, 10 * span))
    late = inputs.orbit >= 2
    assert comp.limits(inputs, mask=late)["trap.fill0"][1] < span / 2
    # the band's parts need their shares
    cov = dict(inputs.covariates, **{"trap_rate.0": np.full(inputs.n, 200.0),
                                     "trap_rate.1": np.full(inputs.n, 400.0),
                                     "trap_share.0": np.full(inputs.n, 0.5)})
    bad = SystematicsInputs(inputs.time, orbit=inputs.orbit, orbit_time=inputs.orbit_time,
                            covariates=cov)
    with pytest.raises(ParameterError, match="trap_share"):
        comp.block(bad, {"fill0": 100.0, "release0": 500.0, "fill1": 500.0, "release1": 1e4})


def test_white_parts_from_the_channels():
    # The white band's parts: the channels' rates and their shares of the white light's
    # electrons (median flux times the fraction inside the white band); a channel with no
    # finite flux is left out, and fewer than two parts leave the one rate.
    from lightledger.tasks.detrendsetup import white_parts

    flux = np.array([[100.0, 300.0, np.nan]] * 5)
    rate = np.array([[10.0, 30.0, np.nan]] * 5)
    rates, shares = white_parts(flux, rate, np.array([1.0, 0.5, 1.0]))
    np.testing.assert_allclose(shares, [100 / 250, 150 / 250])
    np.testing.assert_allclose(rates, rate[:, :2])
    assert white_parts(flux[:, :1], rate[:, :1]) is None


def test_trap_release_grids_are_held_within_what_the_exposures_tell_apart():
    # components.trap_limits moves the release grids' values outside TrapRamp.limits to
    # the limits (release times from the 210 s interval between exposures, here);
    # values inside, the fill grids (a fill time below the exposure's still shapes it,
    # test above) and other shapes stay.
    from lightledger.pipeline.components import trap_limits
    inputs = _inputs()
    comp = TrapRamp(reference_rate=300.0, populations=2)
    model = SystematicsModel((VisitPolynomial(1), OrbitRamp(), comp))
    params, limits = trap_limits(model, inputs)
    assert limits == comp.limits(inputs)
    grids = dict(params)
    before = dict(model.shape_params())
    for name in ("trap.release0", "trap.release1"):
        low, high = limits[name]
        g = np.asarray(grids[name].grid)
        old = np.asarray(before[name].grid)
        assert g.min() >= low * (1 - 1e-12) and g.max() <= high * (1 + 1e-12)
        assert set(old[(old >= low) & (old <= high)]) <= set(g)
    assert min(grids["trap.release0"].grid) == pytest.approx(210.0)
    assert min(before["trap.release0"].grid) < 210.0
    for name in ("trap.fill0", "trap.fill1", "ramp.tau"):
        assert grids[name] == before[name]


def test_a_trap_population_emptying_between_exposures_follows_the_rate():
    # Trapping equations (Zhou et al. 2017): dn/dt = kappa f (1 - n) - n / tau.  With
    # tau far below the 130 s gap between exposures the traps are empty at each
    # exposure's start and reach their equilibrium within it, so the charge lost is a
    # function of that exposure's rate alone: a 1 % dip of the rate (an event) gives
    # the column the event's shape, which then trades with the depth.  A population
    # that keeps its charge between exposures (tau at the 210 s interval and above)
    # does not.
    inputs = _inputs()
    rate = 300.0 * (1 - 0.01 * transit_template(_transit(inputs.time)))
    dimmed = replace(inputs, covariates={**inputs.covariates, "trap_rate": rate})
    comp = TrapRamp(reference_rate=300.0, populations=1)

    def corr(release):
        col = comp.block(dimmed, {"fill0": 100.0, "release0": release}).columns[:, 0]
        return abs(np.corrcoef(col, rate)[0, 1])

    assert corr(1.0) > 0.999
    assert corr(2000.0) < 0.9
