"""Exposure times: mid-exposure UTC to Barycentric Julian Date in TDB.

All arrays are one value per exposure, in exposure order; there is no mask
here (every exposure has a time).  Times on input are UTC as the FITS time
keywords give them (DATE-BEG, an offset in seconds, the exposure duration
XPOSURE); on output, BJD_TDB in days and MJD_UTC in days.

The observer's position enters through the light travel time: the geocentric
position from the OBSGEO-X/Y/Z keywords (metres, Earth-fixed) when present,
the geocentre otherwise.
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["ExposureTimes", "mid_exposure_utc", "barycentric_times", "interpolated_barycentric_times",
           "exposure_times"]

#: Speed of light, m/s (exact by the SI definition).
_C_M_S = 299792458.0
#: TT - TAI, s (exact by definition).
_TT_MINUS_TAI_S = 32.184


@dataclass(frozen=True)
class ExposureTimes:
    """Times of each exposure; returned by :func:`barycentric_times`.

    Attributes
    ----------
    bjd_tdb : ndarray of float, shape (n_exposures,)
        Barycentric Julian Date in the TDB scale, days.  Float64 resolves
        about 40 microseconds at these values.
    mjd_utc : ndarray of float, shape (n_exposures,)
        The input instants as Modified Julian Date in UTC, days.
    light_travel_s : ndarray of float, shape (n_exposures,)
        BJD_TDB - JD_TDB in seconds: the light travel time from the observer
        to the solar system barycentre along the target's direction.
    """

    bjd_tdb: np.ndarray
    mjd_utc: np.ndarray
    light_travel_s: np.ndarray


def mid_exposure_utc(date_beg, start_offset_s, exposure_s):
    """Mid-exposure instants from the FITS time keywords.

    Parameters
    ----------
    date_beg : str
        ISO-8601 UTC of the first exposure's zero read (DATE-BEG).
    start_offset_s : array_like of float, shape (n_exposures,)
        Each exposure's zero-read time in seconds after ``date_beg``.
    exposure_s : float or array_like of float, shape (n_exposures,)
        Seconds from zero read to last read of each exposure (XPOSURE).

    Returns
    -------
    mid : astropy.time.Time, shape (n_exposures,)
        UTC; ``date_beg + start_offset_s + exposure_s / 2``, with the seconds
        counted as SI seconds (a leap second inside the offsets is handled by
        astropy).
    """
    from astropy.time import Time, TimeDelta

    try:
        t_beg = Time(date_beg, scale="utc", format="isot")
    except ValueError as exc:
        raise ParameterError(f"date_beg must be an ISO-8601 UTC string; got {date_beg!r}") from exc
    off = np.atleast_1d(np.asarray(start_offset_s, dtype=float))
    dur = np.broadcast_to(np.asarray(exposure_s, dtype=float), off.shape)
    if off.ndim != 1 or not np.all(np.isfinite(off)):
        raise ParameterError("start_offset_s must be a 1-D array of finite seconds")
    if not np.all(np.isfinite(dur) & (dur >= 0)):
        raise ParameterError("exposure_s must be finite seconds >= 0")
    return t_beg + TimeDelta(off + 0.5 * dur, format="sec")


def _location(obsgeo_m, n):
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    if obsgeo_m is None:
        xyz = np.zeros((n, 3))
    else:
        xyz = np.asarray(obsgeo_m, dtype=float)
        if xyz.shape == (3,):
            xyz = np.broadcast_to(xyz, (n, 3))
        if xyz.shape != (n, 3) or not np.all(np.isfinite(xyz)):
            raise ParameterError(f"obsgeo_m must be finite metres of shape (3,) or ({n}, 3); "
                                 f"got shape {np.shape(obsgeo_m)}")
    return EarthLocation.from_geocentric(xyz[:, 0], xyz[:, 1], xyz[:, 2], unit=u.m)


def barycentric_times(time_utc, ra_deg, dec_deg, *, obsgeo_m=None,
                      offline_earth_orientation=True):
    """BJD_TDB of UTC instants for a target at ICRS (ra, dec).

    There is no mask: every instant is converted; non-finite input raises.

    Parameters
    ----------
    time_utc : astropy.time.Time or array_like of float, shape (n_exposures,)
        The instants (e.g. from :func:`mid_exposure_utc`); plain numbers are
        MJD in UTC.
    ra_deg, dec_deg : float
        Target coordinates, ICRS, degrees.
    obsgeo_m : array_like of float, shape (3,) or (n_exposures, 3), optional
        Observer's geocentric Earth-fixed position (OBSGEO-X/Y/Z) in metres,
        one per instant or one for all.  Default None: the geocentre.
    offline_earth_orientation : bool, optional
        Default True: never download Earth-orientation tables, and accept
        astropy's predicted or mean values where its bundled tables end.  This
        only changes the Earth-fixed to celestial rotation of ``obsgeo_m``;
        0.1 arcsec of error moves a 7000 km position by 3 m, i.e. 10 ns of
        light time.  False: astropy's defaults (it may download, or raise for
        dates past its tables).

    Returns
    -------
    ExposureTimes

    Notes
    -----
    BJD_TDB = JD_TDB + (r_obs . n) / c + (smaller relativistic terms), with
    r_obs the observer's position relative to the solar system barycentre and
    n the unit vector to the target (Eastman et al. 2010, eq. 4 and
    following).  astropy's ``Time.light_travel_time`` with its built-in
    ephemeris computes the correction; the TDB conversion includes the
    observer's location.

    References
    ----------
    Eastman, Siverd & Gaudi 2010, PASP 122, 935.
    Rots et al. 2015, A&A 574, A36 (FITS time keywords).
    """
    import astropy.units as u
    from astropy.coordinates import SkyCoord
    from astropy.time import Time
    from astropy.utils import iers

    for name, val in (("ra_deg", ra_deg), ("dec_deg", dec_deg)):
        if not np.isfinite(val):
            raise ParameterError(f"{name} must be finite degrees; got {val!r}")
    if not -90.0 <= float(dec_deg) <= 90.0:
        raise ParameterError(f"dec_deg must lie in [-90, 90]; got {dec_deg!r}")
    if isinstance(time_utc, Time):
        t = time_utc.utc
        t = t.reshape(-1) if t.ndim != 1 else t
    else:
        mjd = np.atleast_1d(np.asarray(time_utc, dtype=float))
        if mjd.ndim != 1 or not np.all(np.isfinite(mjd)):
            raise ParameterError("time_utc must be a 1-D array of finite MJD (UTC) or a Time")
        t = Time(mjd, format="mjd", scale="utc")
    n = len(t)
    target = SkyCoord(float(ra_deg) * u.deg, float(dec_deg) * u.deg, frame="icrs")

    def _compute():
        tl = Time(t, location=_location(obsgeo_m, n))
        ltt = tl.light_travel_time(target, kind="barycentric")
        bjd = tl.tdb + ltt
        return (np.asarray(bjd.jd, dtype=float), np.asarray(t.mjd, dtype=float),
                np.asarray(ltt.to_value(u.s), dtype=float))

    if offline_earth_orientation:
        with iers.conf.set_temp("auto_download", False), \
                iers.conf.set_temp("auto_max_age", None), \
                iers.conf.set_temp("iers_degraded_accuracy", "warn"):
            bjd, mjd, ltt = _compute()
    else:
        bjd, mjd, ltt = _compute()
    return ExposureTimes(bjd_tdb=bjd, mjd_utc=mjd, light_travel_s=ltt)


def _check_target(ra_deg, dec_deg):
    for name, val in (("ra_deg", ra_deg), ("dec_deg", dec_deg)):
        if not np.isfinite(val):
            raise ParameterError(f"{name} must be finite degrees; got {val!r}")
    if not -90.0 <= float(dec_deg) <= 90.0:
        raise ParameterError(f"dec_deg must lie in [-90, 90]; got {dec_deg!r}")


def interpolated_barycentric_times(time_utc, ra_deg, dec_deg, *, obsgeo_m=None, step_s=3600.0):
    """BJD_TDB of many UTC instants from a coarse grid: the fast form of :func:`barycentric_times`.

    The parameters, the result and the mask contract (none: every instant is
    converted) are those of :func:`barycentric_times`, plus ``step_s``, the
    spacing of the grid in seconds.  Agrees with it to a few microseconds
    (the test suite checks 1 ms over a low-Earth-orbit visit with the
    observer's position and over a twelve-day stare from the geocentre), and
    needs no Earth-orientation table, so it never reads or downloads one.

    Notes
    -----
    BJD_TDB - TAI (as labels of one instant) is 32.184 s (TT - TAI), plus
    TDB - TT, plus the light travel time ``(r_E + r_obs) . n / c`` from the
    observer to the solar system barycentre along the target direction n,
    with r_E the Earth's barycentric position and r_obs the observer's
    geocentric celestial position (Eastman et al. 2010).

    The geocentric part (TDB - TT at the geocentre by ERFA's dtdb, r_E by
    ERFA's epv00, the ephemeris astropy's light_travel_time uses by default)
    changes on the time scale of the Earth's orbit: it is computed on a grid
    of instants ``step_s`` apart (at least four, spanning the instants) and
    interpolated by a cubic spline in TAI, so a leap second inside the visit
    does no harm; the spline's error for a one-hour step is of order 1e-12 s.

    The observer's part is ``r_ITRS . m`` with ``m = C n`` the target
    direction in the Earth-fixed frame, C the celestial-to-terrestrial matrix
    (IAU 2006/2000A, ERFA's c2t06a).  ``m`` turns once a sidereal day, so the
    grid interpolates ``p = R_z(ERA) m``, which moves only with precession
    and nutation, and ``m`` is rebuilt at each instant from the Earth
    rotation angle ERA.  UT1 is taken equal to UTC and polar motion as zero
    (at the grid and the instants alike): below 1 arcsec of rotation, i.e.
    under 0.1 us for a low orbit, plus at most 0.9 s of Earth rotation
    (UT1 - UTC), about 1.5 us.  The observer's term in TDB - TT (about 2 us)
    is left out.  Cost: ERFA on the grid and O(n) array arithmetic.

    References
    ----------
    Eastman, Siverd & Gaudi 2010, PASP 122, 935 (BJD_TDB and its terms).
    Capitaine, Guinot & McCarthy 2000, A&A 355, 398 (Earth rotation angle),
    as implemented by ERFA (era00, c2t06a, dtdb, epv00); citation from memory.
    """
    import erfa
    from astropy.time import Time
    from scipy.interpolate import CubicSpline

    _check_target(ra_deg, dec_deg)
    step_s = float(step_s)
    if not (np.isfinite(step_s) and step_s > 0):
        raise ParameterError(f"step_s must be a finite number of seconds > 0; got {step_s!r}")
    if isinstance(time_utc, Time):
        t = time_utc.utc
        t = t.reshape(-1) if t.ndim != 1 else t
    else:
        mjd = np.atleast_1d(np.asarray(time_utc, dtype=float))
        if mjd.ndim != 1 or not np.all(np.isfinite(mjd)):
            raise ParameterError("time_utc must be a 1-D array of finite MJD (UTC) or a Time")
        t = Time(mjd, format="mjd", scale="utc")
    n = len(t)
    geo = None
    if obsgeo_m is not None:
        geo = np.asarray(obsgeo_m, dtype=float)
        if geo.shape == (3,):
            geo = np.broadcast_to(geo, (n, 3))
        if geo.shape != (n, 3) or not np.all(np.isfinite(geo)):
            raise ParameterError(f"obsgeo_m must be finite metres of shape (3,) or ({n}, 3); "
                                 f"got shape {np.shape(obsgeo_m)}")
    ra, dec = np.deg2rad(float(ra_deg)), np.deg2rad(float(dec_deg))
    direction = np.array([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)])

    tai = t.tai
    day0 = float(tai.jd1[0])
    x = (tai.jd1 - day0) + tai.jd2                              # TAI days after day0
    step = step_s / 86400.0
    lo, hi = float(x.min()), float(x.max())
    k = max(4, int(np.ceil((hi - lo) / step)) + 1)
    half = 0.5 * max(hi - lo, 3.0 * step)
    xn = np.linspace(0.5 * (lo + hi) - half, 0.5 * (lo + hi) + half, k)
    d1 = np.full(k, day0)
    tt2 = xn + _TT_MINUS_TAI_S / 86400.0
    tdb_tt = erfa.dtdb(d1, tt2, 0.0, 0.0, 0.0, 0.0)             # geocentre: no location terms
    earth = erfa.epv00(d1, tt2 + tdb_tt / 86400.0)[1]["p"]      # barycentric, au
    ltt_nodes = earth @ direction * (erfa.DAU / _C_M_S)
    ltt = CubicSpline(xn, ltt_nodes)(x)
    total = CubicSpline(xn, _TT_MINUS_TAI_S + tdb_tt + ltt_nodes)(x)
    if geo is not None:
        utc_nodes = Time(d1, xn, format="jd", scale="tai").utc
        c2t = erfa.c2t06a(d1, tt2, utc_nodes.jd1, utc_nodes.jd2, 0.0, 0.0)
        m = c2t @ direction                                     # (k, 3): n in Earth-fixed axes
        era = erfa.era00(utc_nodes.jd1, utc_nodes.jd2)
        c, s = np.cos(era), np.sin(era)
        p = CubicSpline(xn, np.stack([c * m[:, 0] - s * m[:, 1], s * m[:, 0] + c * m[:, 1], m[:, 2]],
                                     axis=1), axis=0)(x)
        era = erfa.era00(t.jd1, t.jd2)
        c, s = np.cos(era), np.sin(era)
        observer = (geo[:, 0] * (c * p[:, 0] + s * p[:, 1]) + geo[:, 1] * (c * p[:, 1] - s * p[:, 0])
                    + geo[:, 2] * p[:, 2]) / _C_M_S
        total = total + observer
        ltt = ltt + observer
    bjd = tai.jd1 + (tai.jd2 + total / 86400.0)
    return ExposureTimes(bjd_tdb=np.asarray(bjd, float), mjd_utc=np.asarray(t.mjd, float),
                         light_travel_s=np.asarray(ltt, float))


def exposure_times(date_beg, start_offset_s, exposure_s, ra_deg, dec_deg, *,
                   obsgeo_m=None, offline_earth_orientation=True):
    """Mid-exposure BJD_TDB and MJD_UTC from the FITS time keywords.

    Shorthand for :func:`mid_exposure_utc` followed by
    :func:`barycentric_times`; see those for the parameters.

    Returns
    -------
    ExposureTimes
    """
    mid = mid_exposure_utc(date_beg, start_offset_s, exposure_s)
    return barycentric_times(mid, ra_deg, dec_deg, obsgeo_m=obsgeo_m,
                             offline_earth_orientation=offline_earth_orientation)
