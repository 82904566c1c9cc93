"""Sky geometry of a planet on a circular or eccentric orbit.

The planet's position follows Kepler's equation.  Times are referred to the
mid-transit time ``t0`` (inferior conjunction), the argument of periastron
``omega`` (degrees) and eccentricity ``e``; the secondary eclipse (superior
conjunction) falls at :func:`eclipse_time`, away from phase 0.5 when
:math:`e \\cos\\omega \\neq 0`.  Alongside the separation ``z`` the geometry
gives the *orbital angle from transit*, :math:`\\xi = f + \\omega - \\pi/2`
(:math:`f` the true anomaly): 0 at mid-transit (the night side faces the
observer), :math:`\\pi` at mid-eclipse (the day side faces the observer), and
:math:`2\\pi (t - t_0)/P` for a circular orbit.  Phase curves are written in
this angle (:mod:`lightledger.pipeline.phasecurve`).

Conventions (those of the reference library batman, Kreidberg 2015, which
the tests compare with): the observer looks along the sky-plane normal;
the planet is in front of the star when :math:`\\sin(\\omega + f) > 0`;
the separation in stellar radii is
:math:`z = r \\sqrt{1 - \\sin^2(\\omega + f) \\sin^2 i}` with
:math:`r = a (1 - e^2) / (1 + e \\cos f)` (Winn 2010, eq. 5-7; from memory).

Inputs are not modified; every function is vectorised over time.
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["Ephemeris", "OrbitState", "orbit_state", "eccentric_anomaly", "eclipse_time",
           "transit_times_in", "eclipse_times_in"]


@dataclass(frozen=True)
class Ephemeris:
    """A planet's orbit as seen from the observer.

    Attributes
    ----------
    t0 : float
        BJD_TDB of a mid-transit (inferior conjunction), days.
    period : float
        Orbital period, days, > 0.
    a_rs : float
        Semi-major axis in stellar radii, > 1.
    inclination : float
        Degrees, 0-180 (90 = edge on).
    eccentricity : float
        0 <= e < 1.
    omega : float
        Argument of periastron, degrees (90 for a circular orbit by
        convention: transit at periastron's quadrature).
    """

    t0: float
    period: float
    a_rs: float
    inclination: float
    eccentricity: float = 0.0
    omega: float = 90.0

    def __post_init__(self):
        for name in ("t0", "period", "a_rs", "inclination", "eccentricity", "omega"):
            value = getattr(self, name)
            if not np.isfinite(value):
                raise ParameterError(f"{name} must be a finite number; got {value!r}")
            object.__setattr__(self, name, float(value))
        if self.period <= 0:
            raise ParameterError(f"period must be > 0 days; got {self.period}")
        if self.a_rs <= 1:
            raise ParameterError(f"a_rs must be > 1 (the planet orbits outside the star); "
                                 f"got {self.a_rs}")
        if not 0 <= self.inclination <= 180:
            raise ParameterError(f"inclination must be within [0, 180] degrees; got {self.inclination}")
        if not 0 <= self.eccentricity < 1:
            raise ParameterError(f"eccentricity must be within [0, 1); got {self.eccentricity}")
        if self.a_rs * (1 - self.eccentricity) <= 1:
            raise ParameterError("the periastron distance a_rs (1 - e) must exceed one stellar "
                                 "radius")


@dataclass(frozen=True)
class OrbitState:
    """Geometry at each time; returned by :func:`orbit_state`.

    Attributes
    ----------
    z : ndarray of float, shape (n_times,)
        Sky-projected centre separation, stellar radii.
    in_front : ndarray of bool, shape (n_times,)
        True where the planet is between the observer and the star.
    angle : ndarray of float, shape (n_times,)
        Orbital angle from transit :math:`\\xi`, radians in [0, 2 pi).
    true_anomaly : ndarray of float, shape (n_times,)
        Radians.
    distance : ndarray of float, shape (n_times,)
        Star-planet distance, stellar radii.
    """

    z: np.ndarray
    in_front: np.ndarray
    angle: np.ndarray
    true_anomaly: np.ndarray
    distance: np.ndarray


def eccentric_anomaly(mean_anomaly, eccentricity, *, tol=1e-13, max_iter=50):
    """Solve Kepler's equation :math:`M = E - e \\sin E` for :math:`E`.

    Parameters
    ----------
    mean_anomaly : array_like of float
        Radians.
    eccentricity : float
        0 <= e < 1.
    tol : float, optional
        Convergence of the Newton steps, radians.
    max_iter : int, optional

    Returns
    -------
    ndarray of float
        Eccentric anomaly, radians, the shape of ``mean_anomaly``.

    Notes
    -----
    Newton's method from :math:`E_0 = M + e \\sin M` (common practice); for
    e < 0.9 it converges to 1e-13 in a handful of steps.
    """
    M = np.asarray(mean_anomaly, dtype=float)
    e = float(eccentricity)
    if e == 0:
        return M.copy()
    E = M + e * np.sin(M)
    for _ in range(int(max_iter)):
        step = (E - e * np.sin(E) - M) / (1.0 - e * np.cos(E))
        E = E - step
        if np.max(np.abs(step), initial=0.0) < tol:
            break
    return E


def _true_from_eccentric(E, e):
    return 2.0 * np.arctan2(np.sqrt(1.0 + e) * np.sin(0.5 * E), np.sqrt(1.0 - e) * np.cos(0.5 * E))


def _mean_from_true(f, e):
    E = 2.0 * np.arctan2(np.sqrt(1.0 - e) * np.sin(0.5 * f), np.sqrt(1.0 + e) * np.cos(0.5 * f))
    return E - e * np.sin(E)


def _periastron_time(eph):
    """A time of periastron passage, days."""
    w = np.deg2rad(eph.omega)
    m_tr = _mean_from_true(0.5 * np.pi - w, eph.eccentricity)
    return eph.t0 - eph.period * m_tr / (2.0 * np.pi)


def orbit_state(time, ephemeris):
    """Separation, side and orbital angle of the planet at each time.

    Parameters
    ----------
    time : array_like of float, shape (n_times,)
        BJD_TDB, days.
    ephemeris : Ephemeris

    Returns
    -------
    OrbitState

    References
    ----------
    Winn 2010, in Exoplanets (ed. Seager), section 2; Kreidberg 2015, PASP
    127, 1161 (batman, the reference library in the tests).
    """
    t = np.asarray(time, dtype=float)
    eph = ephemeris
    e = eph.eccentricity
    w = np.deg2rad(eph.omega)
    inc = np.deg2rad(eph.inclination)
    if e == 0:
        # Circular: the true anomaly runs uniformly from its value at transit.
        f = 2.0 * np.pi * (t - eph.t0) / eph.period + (0.5 * np.pi - w)
        r = np.full(t.shape, eph.a_rs)
    else:
        M = 2.0 * np.pi * (t - _periastron_time(eph)) / eph.period
        E = eccentric_anomaly(np.mod(M, 2.0 * np.pi), e)
        f = _true_from_eccentric(E, e)
        r = eph.a_rs * (1.0 - e * np.cos(E))
    s = np.sin(w + f)
    z = r * np.sqrt(np.clip(1.0 - (s * np.sin(inc)) ** 2, 0.0, None))
    angle = np.mod(f + w - 0.5 * np.pi, 2.0 * np.pi)
    return OrbitState(z=z, in_front=s > 0, angle=angle, true_anomaly=f, distance=r)


def eclipse_time(ephemeris):
    """Mid-eclipse (superior conjunction) time following ``t0``, BJD_TDB days.

    Parameters
    ----------
    ephemeris : Ephemeris

    Returns
    -------
    float
        ``t0 + period/2`` for a circular orbit; otherwise the time at which
        :math:`f + \\omega = 3\\pi/2`.
    """
    eph = ephemeris
    e = eph.eccentricity
    if e == 0:
        return eph.t0 + 0.5 * eph.period
    w = np.deg2rad(eph.omega)
    m_tr = _mean_from_true(0.5 * np.pi - w, e)
    m_ec = _mean_from_true(1.5 * np.pi - w, e)
    return float(eph.t0 + eph.period * np.mod(m_ec - m_tr, 2.0 * np.pi) / (2.0 * np.pi))


def transit_times_in(ephemeris, start, stop):
    """Mid-transit times within [start, stop] (days), in order."""
    eph = ephemeris
    k = np.arange(np.ceil((start - eph.t0) / eph.period), np.floor((stop - eph.t0) / eph.period) + 1)
    return eph.t0 + k * eph.period


def eclipse_times_in(ephemeris, start, stop):
    """Mid-eclipse times within [start, stop] (days), in order."""
    eph = ephemeris
    te = eclipse_time(eph)
    k = np.arange(np.ceil((start - te) / eph.period), np.floor((stop - te) / eph.period) + 1)
    return te + k * eph.period
