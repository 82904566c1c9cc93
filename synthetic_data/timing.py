"""When each exposure starts, where the observer is, and BJD_TDB.

Time scales and the light-travel time to the solar-system barycentre are
astropy's (Eastman, Siverd & Gaudi 2010 describe BJD_TDB); astropy is run
with automatic IERS downloads off, so only its bundled tables are used (the
demo dates lie inside them).
"""

from typing import NamedTuple

import numpy as np
from astropy import units as u
from astropy.coordinates import (GCRS, ITRS, CartesianRepresentation, EarthLocation,
                                 SkyCoord)
from astropy.time import Time
from astropy.utils import iers

from lightledger.pipeline.errors import ParameterError

__all__ = ["Schedule", "exposure_schedule", "observer_position", "bjd_tdb"]

_GM_EARTH = 3.986004418e14      # m^3 s^-2 (common practice)
_R_EARTH = 6378137.0            # m, equatorial radius


class Schedule(NamedTuple):
    """Start times of the exposures of a visit.

    Attributes
    ----------
    start : ndarray of float
        Zero-read time of each exposure, s after the visit's DATE-BEG.
    orbit : ndarray of int
        Orbit index (0 for a continuous visit).
    orbit_start : ndarray of float
        Start of the exposure's visibility window (s after DATE-BEG).
    """

    start: np.ndarray
    orbit: np.ndarray
    orbit_start: np.ndarray


def exposure_schedule(*, n_exposures, exposure_time, n_orbits, orbit_period,
                      visibility, cadence, overhead=10.0):
    """Exposure start times, spread over the visibility windows of the orbits.

    Parameters
    ----------
    n_exposures : int
        Exposures of the visit (>= 2 per orbit).
    exposure_time : float
        Zero read to last read, s.
    n_orbits : int
        Orbits of the visit; 0 for one continuous window at ``cadence``.
    orbit_period, visibility : float
        Orbit length and the visible part at its start, s.
    cadence : float
        Zero read to next zero read of a continuous visit, s.
    overhead : float, optional
        Least gap between the last read and the next zero read, s.

    Returns
    -------
    Schedule
    """
    n_exposures = int(n_exposures)
    if n_orbits == 0:
        if n_exposures < 2:
            raise ParameterError("n_exposures must be >= 2")
        start = np.arange(n_exposures) * cadence
        return Schedule(start, np.zeros(n_exposures, int), np.zeros(n_exposures))
    per_orbit = [len(a) for a in np.array_split(np.arange(n_exposures), n_orbits)]
    max_per_orbit = int((visibility - exposure_time) // (exposure_time + overhead)) + 1
    if min(per_orbit) < 2 or max(per_orbit) > max_per_orbit:
        raise ParameterError(f"n_exposures must be between {2 * n_orbits} and "
                             f"{max_per_orbit * n_orbits} for {n_orbits} orbits")
    starts, orbits, orbit_starts = [], [], []
    for k, n in enumerate(per_orbit):
        step = (visibility - exposure_time) / (n - 1)
        o0 = k * orbit_period
        starts.append(o0 + step * np.arange(n))
        orbits.append(np.full(n, k))
        orbit_starts.append(np.full(n, o0))
    return Schedule(np.concatenate(starts), np.concatenate(orbits), np.concatenate(orbit_starts))


def observer_position(times, *, altitude_km, inclination_deg, node_deg=40.0, phase0_deg=0.0):
    """Geocentric Earth-fixed (ITRS) position of a satellite on a circular orbit.

    Parameters
    ----------
    times : astropy.time.Time
        Instants (any scale).
    altitude_km : float
        Height above the equatorial radius, km.
    inclination_deg, node_deg, phase0_deg : float
        Orbit inclination, right ascension of the ascending node and the
        argument of latitude at ``times[0]``, degrees (inertial GCRS frame).

    Returns
    -------
    ndarray of float, shape (n_times, 3)
        X, Y, Z in metres (the values of OBSGEO-X/Y/Z).

    Notes
    -----
    Mean motion n = sqrt(GM / r^3) for radius r; the inertial position is
    rotated into the Earth-fixed frame by astropy's GCRS -> ITRS transform.
    """
    r = _R_EARTH + altitude_km * 1e3
    mean_motion = np.sqrt(_GM_EARTH / r ** 3)
    dt = (times - times[0]).to_value(u.s)
    arg = np.deg2rad(phase0_deg) + mean_motion * dt
    inc, node = np.deg2rad(inclination_deg), np.deg2rad(node_deg)
    x_orb, y_orb = r * np.cos(arg), r * np.sin(arg)
    x = x_orb * np.cos(node) - y_orb * np.cos(inc) * np.sin(node)
    y = x_orb * np.sin(node) + y_orb * np.cos(inc) * np.cos(node)
    z = y_orb * np.sin(inc)
    with iers.conf.set_temp("auto_download", False):
        gcrs = GCRS(CartesianRepresentation(x * u.m, y * u.m, z * u.m), obstime=times)
        itrs = gcrs.transform_to(ITRS(obstime=times))
        xyz = itrs.cartesian.xyz.to_value(u.m)
    return np.asarray(xyz).T


def bjd_tdb(times, *, ra, dec, position=None):
    """Barycentric Julian Date (TDB) of UTC instants for a target.

    Parameters
    ----------
    times : astropy.time.Time
        Instants (UTC).
    ra, dec : float
        Target ICRS coordinates, degrees.
    position : ndarray of float, shape (n_times, 3), optional
        Observer ITRS position in metres; None = geocentre.

    Returns
    -------
    ndarray of float
        BJD_TDB in days.
    """
    target = SkyCoord(ra * u.deg, dec * u.deg, frame="icrs")
    with iers.conf.set_temp("auto_download", False):
        if position is None:
            t = Time(times)
            location = EarthLocation.from_geocentric(0.0, 0.0, 0.0, unit=u.m)
        else:
            location = EarthLocation.from_geocentric(position[:, 0], position[:, 1],
                                                     position[:, 2], unit=u.m)
            t = Time(times, location=location)
        ltt = t.light_travel_time(target, kind="barycentric", location=location)
        return (t.tdb + ltt).jd
