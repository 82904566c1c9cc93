"""Tests of lightledger.pipeline.timing against independent computations."""

import warnings

import numpy as np
import pytest

from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.timing import barycentric_times, exposure_times, mid_exposure_utc

AU_KM = 149597870.7          # IAU 2012 Resolution B2, exact
C_KM_S = 299792.458          # SI definition, exact
TT_MINUS_UTC_S = 37.0 + 32.184  # TAI-UTC = 37 s since 2017-01-01 (IERS Bulletin C, from memory);
                                # TT = TAI + 32.184 s (IAU definition)


def _kepler_position(T, L0, L1, a, e, varpi, node, inc):
    """Heliocentric ecliptic-J2000 position (AU) from mean elements at T Julian centuries."""
    L = np.radians(L0 + L1 * T)
    varpi, node, inc = np.radians([varpi, node, inc])
    M = np.mod(L - varpi, 2 * np.pi)
    E = M.copy()
    for _ in range(20):  # Newton iterations of Kepler's equation E - e sin E = M
        E = E - (E - e * np.sin(E) - M) / (1 - e * np.cos(E))
    xp, yp = a * (np.cos(E) - e), a * np.sqrt(1 - e * e) * np.sin(E)
    w = varpi - node
    cw, sw, cn, sn, ci, si = np.cos(w), np.sin(w), np.cos(node), np.sin(node), np.cos(inc), np.sin(inc)
    x = (cw * cn - sw * sn * ci) * xp + (-sw * cn - cw * sn * ci) * yp
    y = (cw * sn + sw * cn * ci) * xp + (-sw * sn + cw * cn * ci) * yp
    z = (sw * si) * xp + (cw * si) * yp
    return np.stack([x, y, z], axis=-1)


def _almanac_roemer_s(jd, ra_deg, dec_deg):
    """Roemer delay (s) of the geocentre relative to the barycentre, independent of astropy.

    Earth: the Astronomical Almanac's low-precision solar coordinates (formulas in
    REFERENCES.md, from memory), referred to the J2000 equinox by removing the general
    precession in longitude, 50.29 arcsec per year (from memory).  Sun about the
    barycentre: reflex of Jupiter and Saturn on Keplerian mean elements, Uranus and
    Neptune on circular orbits (Standish's approximate J2000 elements for the major
    planets, from memory), mass ratios 1/1047.35, 1/3497.9, 1/22902, 1/19412 (from
    memory).  Expected accuracy: a few tenths of a second.
    """
    n = jd - 2451545.0
    T = n / 36525.0
    L = 280.460 + 0.9856474 * n
    g = np.radians(357.528 + 0.9856003 * n)
    lam = L + 1.915 * np.sin(g) + 0.020 * np.sin(2 * g)
    R = 1.00014 - 0.01671 * np.cos(g) - 0.00014 * np.cos(2 * g)
    lam_j2000 = np.radians(lam - 50.29 / 3600.0 * n / 365.25)
    sun_geo_ecl = np.stack([R * np.cos(lam_j2000), R * np.sin(lam_j2000), 0 * R], axis=-1)
    earth_helio = -sun_geo_ecl
    jup = _kepler_position(T, 34.39644, 3034.74613, 5.20289, 0.04839, 14.72848, 100.47391, 1.30440)
    sat = _kepler_position(T, 49.95424, 1222.49362, 9.53668, 0.05386, 92.59888, 113.66242, 2.48599)
    ura = _kepler_position(T, 313.23810, 428.48203, 19.18916, 0.0, 170.95428, 74.01692, 0.77264)
    nep = _kepler_position(T, -55.12003, 218.45945, 30.06992, 0.0, 44.96476, 131.78423, 1.77004)
    sun_bary = -(jup / 1047.35 + sat / 3497.9 + ura / 22902.0 + nep / 19412.0)
    earth_bary = earth_helio + sun_bary
    eps = np.radians(23.439291)  # J2000 obliquity (from memory)
    x, y, z = earth_bary[..., 0], earth_bary[..., 1], earth_bary[..., 2]
    r_eq = np.stack([x, y * np.cos(eps) - z * np.sin(eps), y * np.sin(eps) + z * np.cos(eps)], axis=-1)
    ra, dec = np.radians(ra_deg), np.radians(dec_deg)
    nhat = np.array([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)])
    return (r_eq @ nhat) * AU_KM / C_KM_S


@pytest.mark.parametrize("ra, dec", [(123.456, -12.345), (10.0, 60.0), (250.0, -70.0), (300.0, 5.0)])
def test_bjd_tdb_matches_almanac_roemer_delay(ra, dec):
    # Dates over a year so that the Earth's position and the sign of the delay vary.
    mjd = 60999.0 + np.linspace(0.0, 365.0, 13)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = barycentric_times(mjd, ra, dec)
    jd_utc = mjd + 2400000.5
    # BJD_TDB - JD_TT = Roemer delay + (TDB - TT, < 2 ms) + Shapiro (< 0.1 ms): Eastman
    # et al. 2010, sections 2.3-2.5.
    delay_s = (res.bjd_tdb - jd_utc) * 86400.0 - TT_MINUS_UTC_S
    expected_s = _almanac_roemer_s(jd_utc, ra, dec)
    # Tolerance 2 s: the Almanac formulas are good to about a second (REFERENCES.md).
    assert np.max(np.abs(delay_s - expected_s)) < 2.0
    # The Roemer delay is up to ~499 s: the check is not vacuous.
    assert np.max(np.abs(expected_s)) > 100.0
    np.testing.assert_allclose(res.mjd_utc, mjd, rtol=0, atol=1e-9)
    np.testing.assert_allclose(res.light_travel_s, expected_s, atol=2.0)


def test_leo_position_shifts_by_at_most_light_time_of_radius():
    # Light time across 6900 km: 6.9e6 m / c = 23.02 ms (geometry; c exact).
    rng = np.random.default_rng(3)
    mjd = 60999.0 + np.linspace(0.0, 0.3, 40)
    v = rng.normal(size=(mjd.size, 3))
    obsgeo = 6.9e6 * v / np.linalg.norm(v, axis=1, keepdims=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        geo = barycentric_times(mjd, 123.456, -12.345)
        leo = barycentric_times(mjd, 123.456, -12.345, obsgeo_m=obsgeo)
    shift_ms = (leo.light_travel_s - geo.light_travel_s) * 1e3
    assert np.max(np.abs(shift_ms)) <= 23.02 + 0.05
    assert np.max(np.abs(shift_ms)) > 5.0  # random directions: some shift is large
    # The float BJD (resolution ~40 us) carries the same shift.
    bjd_shift_ms = (leo.bjd_tdb - geo.bjd_tdb) * 86400e3
    np.testing.assert_allclose(bjd_shift_ms, shift_ms, atol=0.1)


def test_leo_position_toward_target_gives_full_shift():
    # An observer 6900 km along the Earth's rotation axis and a target at the pole:
    # the shift is +6.9e6 m / c = 23.02 ms times the cosine of the angle between the
    # Earth-fixed z axis and the ICRS pole (precession since J2000, ~0.15 deg, cosine
    # 1 - 4e-6: negligible).  Geometry; c exact.
    mjd = np.array([60999.0, 61100.0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        geo = barycentric_times(mjd, 0.0, 90.0)
        leo = barycentric_times(mjd, 0.0, 90.0, obsgeo_m=[0.0, 0.0, 6.9e6])
    shift_ms = (leo.light_travel_s - geo.light_travel_s) * 1e3
    np.testing.assert_allclose(shift_ms, 6.9e6 / 299792458.0 * 1e3, atol=0.01)


def test_mid_exposure_across_leap_second():
    # A leap second was inserted at 2016-12-31T23:59:60 UTC (IERS Bulletin C 52, from
    # memory): 2 SI seconds after 23:59:59 is 00:00:00 of 2017-01-01, not 00:00:01.
    mid = mid_exposure_utc("2016-12-31T23:59:59", [2.0], 0.0)
    assert mid.utc.isot[0] == "2017-01-01T00:00:00.000"
    # Without a leap second the plain sum holds.
    mid = mid_exposure_utc("2025-11-20T03:00:00", [0.0, 100.0], 60.0)
    assert list(mid.utc.isot) == ["2025-11-20T03:00:30.000", "2025-11-20T03:02:10.000"]


def test_exposure_times_chain_and_errors():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = exposure_times("2025-11-20T03:00:00", np.arange(4) * 100.0, 60.0, 123.4, -12.3)
    assert res.bjd_tdb.shape == res.mjd_utc.shape == res.light_travel_s.shape == (4,)
    # Consecutive exposures 100 s apart stay 100 s apart in BJD to within the change
    # of the light travel time (< 0.03 s per 100 s, Earth's speed 30 km/s / c * 100 s).
    np.testing.assert_allclose(np.diff(res.bjd_tdb) * 86400.0, 100.0, atol=0.03)
    with pytest.raises(ParameterError, match="date_beg"):
        mid_exposure_utc("not a date", [0.0], 1.0)
    with pytest.raises(ParameterError, match="obsgeo_m"):
        barycentric_times([60999.0, 61000.0], 1.0, 2.0, obsgeo_m=[[1.0, 2.0, 3.0]] * 3)
    with pytest.raises(ParameterError, match="dec_deg"):
        barycentric_times([60999.0], 1.0, 95.0)
