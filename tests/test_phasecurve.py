"""Tests of the full-orbit event model, the orbit geometry and the joint fit of visits.

Sources: batman (Kreidberg 2015; the reference library for transit and
secondary-eclipse shapes, circular and eccentric), Cowan & Agol 2008 (the
sinusoidal phase curve and its offset), Winn 2010 (eccentric eclipse timing),
and defining properties (noise-free recovery, Monte Carlo error checks).
"""

from functools import partial

import batman
import numpy as np
import pytest

from lightledger.pipeline.covariates import exposure_covariates
from lightledger.pipeline.detrend import fit_at_fitted_radius, fit_event, fit_light_curve
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.eventshapes import transit_template
from lightledger.pipeline.jointfit import PlanetModel, VisitData, fit_joint
from lightledger.pipeline.orbit import Ephemeris, eclipse_time, orbit_state
from lightledger.pipeline.phasecurve import (full_orbit_flux, planet_columns, planet_flux,
                                             summarise_planet)
from lightledger.pipeline.programme import PlanetPoints, phase_resolved_spectrum
from lightledger.pipeline.systematics import SystematicsInputs, standard_model
from lightledger.pipeline.transit import (limb_darkened_blocked_fraction, occulted_fraction_uniform,
                                          transit_flux)

MIN = 1.0 / 1440.0
T0 = 2460100.25
ORBITS = [(0.0, 90.0), (0.15, 40.0), (0.3, 250.0)]


def _batman(t, e, w, *, rp=0.1, fp=None, t_sec=None, u=(0.2, 0.25)):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = T0, 1.3, rp, 4.0, 85.0, e, w
    p.u, p.limb_dark = list(u), "quadratic"
    if fp is None:
        return batman.TransitModel(p, t).light_curve(p)
    p.fp = fp
    p.t_secondary = batman.TransitModel(p, t).get_t_secondary(p) if t_sec is None else t_sec
    return batman.TransitModel(p, t, transittype="secondary").light_curve(p), p.t_secondary


@pytest.mark.parametrize("e,w", ORBITS)
def test_eclipse_and_transit_shapes_match_batman(e, w):
    # batman (Kreidberg 2015): the transit of a quadratically limb-darkened star to 1e-7
    # (our quadrature's stated accuracy, pipeline/transit.py) and the secondary eclipse of
    # a uniform planet, 1 + fp * visible, to 1 ppm, on circular and eccentric orbits.
    eph = Ephemeris(T0, 1.3, 4.0, 85.0, e, w)
    t = np.linspace(T0 - 0.7, T0 + 1.4, 30001)
    st = orbit_state(t, eph)
    ld = np.where(st.in_front & (st.z < 1.1),
                  1 - limb_darkened_blocked_fraction(st.z, 0.1, 0.2, 0.25), 1.0)
    assert np.max(np.abs(ld - _batman(t, e, w))) < 1e-7
    fp = 2e-3
    sec, t_sec = _batman(t, e, w, fp=fp)
    visible = np.where(st.in_front, 1.0, 1 - occulted_fraction_uniform(st.z, 0.1))
    assert np.max(np.abs(sec - (1 + fp * visible))) < 1e-6
    # The eclipse time (superior conjunction) agrees with batman's, modulo the period.
    d = (eclipse_time(eph) - t_sec) / 1.3
    assert abs(d - round(d)) * 1.3 < 1e-6


def test_full_orbit_flux_is_transit_plus_eclipse_of_the_phase_curve():
    # The full-orbit model 1 - lambda + F_p v against batman's transit and secondary
    # eclipse evaluated separately (Kreidberg 2015): with a constant planet flux
    # E = transit + secondary - 1 to 1 ppm; with a first-harmonic planet flux the
    # planet's visible part is F_p(xi) times batman's visible fraction (Cowan & Agol 2008).
    e, w = 0.15, 40.0
    eph = Ephemeris(T0, 1.3, 4.0, 85.0, e, w)
    t = np.linspace(T0 - 0.2, T0 + 1.5, 12001)
    fp = 1.5e-3
    sec, _ = _batman(t, e, w, fp=fp)
    tra = _batman(t, e, w)
    E = full_orbit_flux(t, eph, 0.1, 0.2, 0.25, [fp, 0.0, 0.0])
    assert np.max(np.abs(E - (tra + sec - 1))) < 1e-6
    coef = np.array([8e-4, -7e-4, 1e-4])
    xi = orbit_state(t, eph).angle
    direct = coef[0] + coef[1] * np.cos(xi) + coef[2] * np.sin(xi)
    E2 = full_orbit_flux(t, eph, 0.1, 0.2, 0.25, coef)
    assert np.max(np.abs(E2 - (tra - 1 + 1 + direct * (sec - 1) / fp))) < 1e-6


def test_eccentric_eclipse_falls_away_from_half_phase():
    # Winn 2010, eq. 33 (from memory): the eclipse follows the transit by
    # P/2 (1 + (4/pi) e cos(omega)) to first order in e.
    for e, w in ((0.02, 30.0), (0.03, 120.0)):
        eph = Ephemeris(T0, 1.3, 4.0, 85.0, e, w)
        lag = eclipse_time(eph) - T0
        first = 0.65 * (1 + 4 / np.pi * e * np.cos(np.deg2rad(w)))
        assert lag == pytest.approx(first, abs=0.65 * 4 * e * e)
        assert abs(lag - 0.65) > 1e-3
    with pytest.raises(ParameterError, match="eccentricity"):
        Ephemeris(T0, 1.3, 4.0, 85.0, 1.2, 90.0)


def test_sinusoid_offset_and_landmarks_cowan_agol():
    # Cowan & Agol 2008: F = A0 + A1 cos(xi) + B1 sin(xi) = A0 + A cos(xi - xi_max) with
    # A = hypot(A1, B1), xi_max = atan2(B1, A1); day side at xi = pi (eclipse), night side
    # at xi = 0 (transit), peak-to-trough 2 A, and the hotspot offset (the maximum's lead
    # on the eclipse) 180 deg - xi_max.  Checked against a direct dense evaluation.
    c = np.array([9e-4, -6e-4, 1.2e-4])
    x = np.linspace(0, 2 * np.pi, 720001)
    direct = c[0] + c[1] * np.cos(x) + c[2] * np.sin(x)
    np.testing.assert_allclose(planet_flux(c, x), direct, rtol=0, atol=1e-15)
    # (a negligible covariance: the landmarks of the coefficients themselves)
    s = summarise_planet(c, np.diag([1e-30, 1e-30, 1e-30]))
    assert s.day == pytest.approx(c[0] - c[1], abs=1e-15)
    assert s.night == pytest.approx(c[0] + c[1], abs=1e-15)
    assert s.amplitude == pytest.approx(direct.max() - direct.min(), abs=1e-12)
    assert s.offset_deg == pytest.approx(180 - np.degrees(np.arctan2(c[2], c[1])), abs=1e-9)
    assert s.offset_deg == pytest.approx(180 - np.degrees(x[np.argmax(direct)]), abs=1e-3)
    assert 0 < s.offset_deg < 20      # B1 > 0 with A1 < 0: maximum before the eclipse (east)
    # Second harmonic: the extremes found by the grid + Newton search agree with a dense
    # direct evaluation.
    c2 = np.array([9e-4, -6e-4, 1.2e-4, 1.5e-4, -8e-5])
    d2 = planet_columns(x, 2) @ c2
    s2 = summarise_planet(c2, np.eye(5) * 1e-30)
    assert s2.maximum == pytest.approx(d2.max(), abs=1e-12)
    assert s2.minimum == pytest.approx(d2.min(), abs=1e-12)
    assert s2.offset_deg == pytest.approx(180 - np.degrees(x[np.argmax(d2)]), abs=1e-3)


def test_landmark_errors_match_monte_carlo():
    # Monte Carlo of the coefficients (4000 draws from their covariance), each draw's
    # landmarks by the closed forms of Cowan & Agol 2008 (day c0 - a1, night c0 + a1,
    # peak-to-trough 2 hypot(a1, b1), offset 180 - atan2(b1, a1)): their scatter matches
    # the propagated errors within 5% (the standard error of a sample standard deviation
    # of 4000 draws is 1.1%; amplitude and offset are nonlinear, their errors first order).
    rng = np.random.default_rng(3)
    c = np.array([9e-4, -6e-4, 1.2e-4])
    L = np.array([[3e-5, 0, 0], [1e-5, 2e-5, 0], [-4e-6, 5e-6, 1.5e-5]])
    s = summarise_planet(c, L @ L.T)
    d = c + rng.normal(size=(4000, 3)) @ L.T
    draws = {"day": d[:, 0] - d[:, 1], "night": d[:, 0] + d[:, 1],
             "amplitude": 2 * np.hypot(d[:, 1], d[:, 2]),
             "offset": 180 - np.degrees(np.arctan2(d[:, 2], d[:, 1]))}
    for name, err in (("day", s.day_error), ("night", s.night_error),
                      ("amplitude", s.amplitude_error), ("offset", s.offset_error_deg)):
        assert np.std(draws[name], ddof=1) == pytest.approx(err, rel=0.05)


def test_amplitude_and_offset_of_a_weak_harmonic_keep_their_coverage():
    # Monte Carlo (STYLE.md item 7): a first harmonic measured at a signal-to-noise ratio of
    # about 1.3 with an anisotropic covariance (the sine term worse, as for two short visits
    # near transit and eclipse), 80 trials.  The length of a vector measured with noise is
    # biased upwards (Wardle & Kronberg 1974, from memory) and its angle has wide wings:
    # first-order propagation gives a mean amplitude pull near +0.5 and offset pulls wider
    # than unit.  The posterior summaries (uniform priors on amplitude and angle) must halve
    # the bias (paired on the same trials), narrow the offset pulls, and their 68 % intervals
    # cover the truth in 55-90 % of the trials (binomial sd 5 %; a bounded amplitude's
    # interval may over-cover).
    rng = np.random.default_rng(11)
    c = np.array([8e-4, -7.4e-4, 0.9e-4])                 # offset 7 deg, peak-to-trough 1.49e-3
    cov = np.array([[4e-8, 3e-8, -1e-8], [3e-8, 2.5e-7, -5e-8], [-1e-8, -5e-8, 4.5e-7]])
    L = np.linalg.cholesky(cov)
    truth_amp = 2 * np.hypot(c[1], c[2])
    truth_off = 180 - np.degrees(np.arctan2(c[2], c[1]))
    amp, off, lin_amp, lin_off = [], [], [], []
    for _ in range(80):
        x = c + L @ rng.normal(size=3)
        s = summarise_planet(x, cov)
        amp.append((s.amplitude - truth_amp) / s.amplitude_error)
        off.append(((s.offset_deg - truth_off + 180) % 360 - 180) / s.offset_error_deg)
        # first order: 2|v| with error 2 sqrt(u^T C u) along v; the angle's sqrt(w^T C w)/|v|
        v = x[1:]
        u = v / np.hypot(*v)
        w = np.array([-u[1], u[0]])
        lin_amp.append((2 * np.hypot(*v) - truth_amp) / (2 * np.sqrt(u @ cov[1:, 1:] @ u)))
        d = (180 - np.degrees(np.arctan2(v[1], v[0])) - truth_off + 180) % 360 - 180
        lin_off.append(d / np.degrees(np.sqrt(w @ cov[1:, 1:] @ w) / np.hypot(*v)))
    amp, off = np.array(amp), np.array(off)
    assert np.mean(lin_amp) > 0.3                                  # the failure, shown
    assert np.mean(amp) < 0.6 * np.mean(lin_amp)
    assert np.std(off) < np.std(lin_off)
    assert 0.55 <= np.mean(np.abs(amp) < 1) <= 0.9
    assert 0.55 <= np.mean(np.abs(off) < 1) <= 0.9


def test_amplitude_interval_sides_match_the_rice_posterior():
    # With an isotropic covariance sigma^2 I of (a1, b1) and uniform priors on the first
    # harmonic's amplitude A and angle, the posterior of A is the Rice form
    # p(A) ~ exp(-(A^2 + r^2) / 2 sigma^2) I0(A r / sigma^2) (Rice 1944, from memory;
    # the angle integrated out), and the peak-to-trough amplitude is 2 A (Cowan & Agol
    # 2008).  Its median and the two sides of its central 68.27 % interval, integrated
    # numerically here, must match the summary's amplitude, amplitude_error_lo and
    # amplitude_error_hi to the Monte Carlo precision of 10,000 draws (~2 % of sigma),
    # amplitude_error is their mean; at signal-to-noise 1 the lower side is the shorter
    # (the bound at zero; 0.61 against 0.90 sigma in A by the integral), at 20 both sides
    # approach 2 sigma (first order).
    from scipy.special import i0e

    sigma = 1e-5
    for r, short_below in ((1 * sigma, True), (20 * sigma, False)):
        c = np.array([1e-4, -r, 0.0])
        s = summarise_planet(c, np.diag([1e-10, sigma ** 2, sigma ** 2]))
        A = np.linspace(0.0, r + 10 * sigma, 200001)
        log_p = -(A - r) ** 2 / (2 * sigma ** 2) + np.log(i0e(A * r / sigma ** 2))
        cdf = np.cumsum(np.exp(log_p - log_p.max()))
        cdf /= cdf[-1]
        lo, mid, hi = 2 * np.interp([0.15865, 0.5, 0.84135], cdf, A)
        assert s.amplitude == pytest.approx(mid, abs=0.04 * sigma)
        assert s.amplitude_error_lo == pytest.approx(mid - lo, abs=0.05 * sigma)
        assert s.amplitude_error_hi == pytest.approx(hi - mid, abs=0.05 * sigma)
        assert s.amplitude_error == pytest.approx(0.5 * (s.amplitude_error_lo
                                                         + s.amplitude_error_hi), rel=1e-12)
        assert s.offset_error_deg == pytest.approx(0.5 * (s.offset_error_lo_deg
                                                          + s.offset_error_hi_deg), rel=1e-12)
        if short_below:
            assert s.amplitude_error_lo < 0.8 * s.amplitude_error_hi
        else:
            assert s.amplitude_error_lo == pytest.approx(2 * sigma, rel=0.05)
            assert s.amplitude_error_hi == pytest.approx(2 * sigma, rel=0.05)


def _leo_visit(t_start, n_orbits, cadence=4.0):
    """Low-Earth-orbit sampling (96 min orbits, 50 min visible; REFERENCES.md, common
    practice) from t_start (days)."""
    start = np.concatenate([o * 96 * MIN + np.arange(0, 50, cadence) * MIN
                            for o in range(n_orbits)]) + t_start
    mid = start + 0.5 * MIN
    return mid, exposure_covariates(start, mid)


def _systematics(t, cov, scan, amp0=4e-3):
    x = (t - 0.5 * (t[0] + t[-1])) / (0.5 * (t[-1] - t[0]))
    amp = np.where(cov.orbit == 0, amp0, 1.0e-3)
    return 1e7 * (1 + 1e-3 * x + 2e-4 * cov.orbit_time / cov.orbit_time.max()
                  - amp * np.exp(-cov.orbit_time / (7 * MIN)) + 5e-4 * (scan > 0))


def test_joint_fit_noise_free_full_orbit_is_exact():
    # Defining property (STYLE.md item 9): a noise-free visit of a transit and two eclipses
    # built from the model (per-orbit ramps, visit slope, orbit-phase slope, scan offset)
    # comes back to rounding (1e-8 relative), the radius ratio fitted from a priori 0.097.
    eph = Ephemeris(T0, 1.2, 3.5, 84.0)
    t, cov = _leo_visit(T0 - 0.62, 21)
    scan = np.where(np.arange(t.size) % 2 == 0, 1.0, -1.0)
    coef = np.array([1.0e-3, -8e-4, 1.2e-4])
    flux = _systematics(t, cov, scan) * full_orbit_flux(t, eph, 0.1, 0.2, 0.25, coef)
    inputs = SystematicsInputs(t, orbit=cov.orbit, orbit_time=cov.orbit_time, scan_direction=scan)
    model = standard_model(visit_order=1, orbit_order=1, scan_offset=True, ramp=True,
                           tau_grid=np.array([3.5, 7.0, 14.0]) * MIN)
    # (errors of 1e-9 relative: the coefficients' posterior is as narrow as the landmarks need)
    fit = fit_joint([VisitData(inputs, flux, flux * 1e-18, model)],
                    PlanetModel(eph, 0.097, 0.2, 0.25, harmonics=1))
    assert fit.fitted_radius and fit.fitted_planet
    assert fit.rp_rs == pytest.approx(0.1, abs=1e-9)
    np.testing.assert_allclose(fit.planet, coef, atol=1e-10)
    assert fit.visits[0].tau == pytest.approx(7 * MIN)
    assert np.max(np.abs(fit.visits[0].residuals)) < 1e-8
    # Normalised to the star alone: the detrended flux is the astrophysical model.
    np.testing.assert_allclose(fit.visits[0].detrended, fit.visits[0].astro, atol=1e-8)
    assert fit.summary.offset_deg == pytest.approx(180 - np.degrees(np.arctan2(1.2e-4, -8e-4)))


def test_radius_through_limb_darkened_model_not_a_scaled_template():
    # Noise-free transit (batman, Kreidberg 2015) of rp = 0.118 with the a priori radius
    # 0.105: the radius fitted through the limb-darkened model comes back exactly (the
    # joint fit, and the single-event fit with its template made at the fitted radius),
    # while a template scaled from the a priori radius biases the depth by several ppm
    # (the transit's shape changes with the radius).
    t, cov = _leo_visit(T0 - 0.17, 5, cadence=2.0)
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = T0, 2.9, 0.118, 9.5, 87.6, 0.0, 90.0
    p.u, p.limb_dark = [0.22, 0.28], "quadratic"
    flux = 1e7 * batman.TransitModel(p, t).light_curve(p)
    eph = Ephemeris(T0, 2.9, 9.5, 87.6)
    inputs = SystematicsInputs(t, orbit=cov.orbit, orbit_time=cov.orbit_time)
    fit = fit_joint([VisitData(inputs, flux, flux.copy(), standard_model(visit_order=1))],
                    PlanetModel(eph, 0.105, 0.22, 0.28))
    assert not fit.fitted_planet            # no eclipse in the visit: no planet flux fitted
    assert fit.transit_depth == pytest.approx(0.118 ** 2, abs=1e-8)
    prior = 1 - full_orbit_flux(t, eph, 0.105, 0.22, 0.28, [0.0])
    scaled = fit_event(flux, flux.copy(), transit_template(1 - prior),
                       np.column_stack([(t - t.mean()) / np.ptp(t)]))
    depth_scaled = scaled.depth * prior.max() / 0.105 ** 2     # template scaled to (rp/rs)^2
    assert abs(depth_scaled - 0.118 ** 2) > 5e-6
    # The single-event fit of a transit visit: its template made again at the fitted
    # radius until it stops changing gives the limb-darkened model's depth (1e-9).
    def template_of(rp):
        return (1 - transit_flux(t, t0=T0, period=2.9, rp_rs=rp, a_rs=9.5, inclination=87.6,
                                 u1=0.22, u2=0.28)) / rp ** 2

    inputs1 = SystematicsInputs(t)
    fit1 = partial(fit_light_curve, inputs1, model=standard_model(visit_order=1))
    once = fit1(flux, flux.copy(), template_of(0.105), mask=None)
    again = fit_at_fitted_radius(fit1, template_of, flux, flux.copy(), template_of(0.105))
    assert abs(once.depth - 0.118 ** 2) > 5e-6
    assert again.depth == pytest.approx(0.118 ** 2, abs=1e-9)


def test_phase_resolved_spectrum_weighted_means_and_consistency():
    # Hand computation (common practice): the inverse-variance weighted mean and its error
    # (sum w)^-1/2, out-of-event exposures only; an empty bin is NaN.
    pts = PlanetPoints(visit=np.zeros(6, int), time=np.arange(6.0),
                       phase=np.array([0.05, 0.1, 0.15, 0.3, 0.35, 0.9]),
                       planet_flux=np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0]),
                       planet_error=np.array([1.0, 2.0, 1.0, 1.0, 1.0, 1.0]),
                       model=np.ones(6), visible=np.ones(6), blocked=np.zeros(6),
                       used=np.array([True, True, True, True, False, True]),
                       in_event=np.array([False, False, True, False, False, False]))
    bins = phase_resolved_spectrum([pts], [0.0, 0.25, 0.5, 0.75, 1.0])
    w = np.array([1.0, 0.25])
    assert bins.flux[0, 0] == pytest.approx((1.0 * 1 + 2.0 * 0.25) / w.sum())
    assert bins.error[0, 0] == pytest.approx(1 / np.sqrt(w.sum()))
    assert bins.flux[1, 0] == 4.0 and bins.count[1, 0] == 1
    assert np.isnan(bins.flux[2, 0]) and bins.count[2, 0] == 0
    with pytest.raises(ParameterError, match="phase bin"):
        phase_resolved_spectrum([pts], [0.5, 0.2])
