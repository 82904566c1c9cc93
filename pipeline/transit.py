"""Transit and secondary-eclipse light curves of a planet on a circular orbit.

The transit of a quadratically limb-darkened star follows Mandel & Agol
(2002); the secondary eclipse is the occultation of a uniform planetary disk by
the star.  Every function is vectorised: time and the orbital and planetary
parameters broadcast against each other with numpy's rules, so one call can
return a (n_times, n_channels) array when ``rp_rs`` is a row of radius ratios.
Inputs are never modified and every result is finite (no NaN) for finite
inputs, including the contact points z = 1 - p, z = 1 + p, z = p, z = 0 and
planets larger than the star (p > 1).

How the limb-darkened transit is computed
-----------------------------------------
The blocked flux is written as an integral over annuli of the stellar disk,

    delta(z, p) = [ int_0^1 I(r) 2 r kappa(r; z, p) dr ] / [ int_0^1 I(r) 2 pi r dr ],

where ``kappa`` is half the angle of the annulus of radius r that lies behind
the planet (Mandel & Agol 2002, section 3).  The part of the disk that the
planet covers whole (r < p - z) is integrated in closed form; the annuli cut
by the planet's rim, a <= r <= b with a = |z - p| and b = min(1, z + p), are
integrated by Gauss-Legendre quadrature after the substitution
r = a + (b - a)(1 - cos theta)/2, which removes the square-root behaviour of
kappa and of mu = sqrt(1 - r^2) at both ends and makes the integrand smooth.
With the default 96 nodes the result agrees with the analytic elliptic-
integral form (Kreidberg 2015, whose library the tests use) to better than
1e-7 in relative flux over rp_rs 0.01-0.3 and impact parameters 0-1.1 (see
tests/test_transit.py).

Cost: O(n_times * n_nodes) time and memory; n_nodes = 96 by default.

References
----------
Mandel, K. & Agol, E. 2002, ApJ 580, L171.
Kreidberg, L. 2015, PASP 127, 1161 (the analytic form the tests compare with).
"""

from functools import lru_cache
from typing import NamedTuple

import numpy as np

from .errors import ParameterError

__all__ = [
    "projected_separation",
    "planet_in_front",
    "transit_flux",
    "eclipse_flux",
    "occulted_fraction_uniform",
    "limb_darkened_blocked_fraction",
    "OrbitGeometry",
    "orbit_geometry",
]

_DEFAULT_NODES = 96


class OrbitGeometry(NamedTuple):
    """Sky-projected geometry of a circular orbit.

    Attributes
    ----------
    z : ndarray
        Centre-to-centre separation of planet and star in stellar radii.
    in_front : ndarray of bool
        True where the planet is between the observer and the star (orbital
        phase within a quarter orbit of mid-transit).
    phase : ndarray
        Orbital phase in cycles, (time - t0) / period, not wrapped.
    """

    z: np.ndarray
    in_front: np.ndarray
    phase: np.ndarray


def _check_positive(name, value, *, allow_zero=False):
    value = np.asarray(value, dtype=float)
    bad = ~np.isfinite(value) | ((value < 0) if allow_zero else (value <= 0))
    if np.any(bad):
        bound = ">= 0" if allow_zero else "> 0"
        raise ParameterError(f"{name} must be finite and {bound}; got {value[bad].ravel()[0]!r}")
    return value


def _check_inclination(inclination):
    inclination = np.asarray(inclination, dtype=float)
    if np.any(~np.isfinite(inclination) | (inclination < 0) | (inclination > 180)):
        raise ParameterError("inclination must be in degrees within [0, 180]")
    return inclination


def orbit_geometry(time, *, t0, period, a_rs, inclination):
    """Separation, side and phase of a planet on a circular orbit.

    Parameters
    ----------
    time : array_like of float
        Times in days (BJD_TDB).
    t0 : float or array_like
        Mid-transit time in days (BJD_TDB).
    period : float or array_like
        Orbital period in days, > 0.
    a_rs : float or array_like
        Semi-major axis in stellar radii, > 0.
    inclination : float or array_like
        Orbital inclination in degrees, 0-180 (90 = edge on).

    Returns
    -------
    OrbitGeometry
        ``z`` (stellar radii), ``in_front`` (bool) and ``phase`` (cycles), all
        broadcast to the common shape of the inputs.

    Notes
    -----
    With orbital angle phi = 2 pi (t - t0) / P measured from inferior
    conjunction, the sky-projected separation of a circular orbit is
    z = a sqrt(sin^2 phi + cos^2 i cos^2 phi) and the planet is in front of
    the star when cos phi > 0 (Mandel & Agol 2002, eq. 1 for e = 0).
    """
    time = np.asarray(time, dtype=float)
    period = _check_positive("period", period)
    a_rs = _check_positive("a_rs", a_rs)
    inclination = _check_inclination(inclination)
    phase = (time - np.asarray(t0, dtype=float)) / period
    angle = 2.0 * np.pi * phase
    cos_i = np.cos(np.deg2rad(inclination))
    z = a_rs * np.sqrt(np.sin(angle) ** 2 + (cos_i * np.cos(angle)) ** 2)
    in_front = np.cos(angle) > 0
    z, in_front, phase = np.broadcast_arrays(z, in_front, phase)
    return OrbitGeometry(np.array(z), np.array(in_front), np.array(phase))


def projected_separation(time, *, t0, period, a_rs, inclination):
    """Sky-projected planet-star separation z of a circular orbit.

    Parameters
    ----------
    time : array_like of float
        Times in days (BJD_TDB).
    t0 : float
        Mid-transit time in days (BJD_TDB).
    period : float
        Orbital period in days, > 0.
    a_rs : float
        Semi-major axis in stellar radii, > 0.
    inclination : float
        Orbital inclination in degrees (90 = edge on).

    Returns
    -------
    z : ndarray of float
        Separation in stellar radii, the broadcast shape of the inputs.
        Which side of the star the planet is on is given by
        :func:`planet_in_front`.

    References
    ----------
    Mandel, K. & Agol, E. 2002, ApJ 580, L171.
    """
    return orbit_geometry(time, t0=t0, period=period, a_rs=a_rs, inclination=inclination).z


def planet_in_front(time, *, t0, period):
    """True where the planet is on the observer's side of the star.

    Parameters
    ----------
    time : array_like of float
        Times in days (BJD_TDB).
    t0 : float
        Mid-transit time in days (BJD_TDB).
    period : float
        Orbital period in days, > 0.

    Returns
    -------
    ndarray of bool
        True within a quarter orbit of a mid-transit (cos of the orbital
        angle > 0), False within a quarter orbit of a secondary eclipse.
    """
    period = _check_positive("period", period)
    angle = 2.0 * np.pi * (np.asarray(time, dtype=float) - np.asarray(t0, dtype=float)) / period
    return np.cos(angle) > 0


def occulted_fraction_uniform(z, p):
    """Overlap of the unit stellar disk and a disk of radius p, over pi p^2.

    For the transit of a uniform star the blocked flux is p^2 times this
    fraction; for a secondary eclipse it is the fraction of the (uniform)
    planet that is hidden.

    Parameters
    ----------
    z : array_like of float
        Centre-to-centre separation in stellar radii, >= 0.
    p : array_like of float
        Radius of the second disk in stellar radii, >= 0.

    Returns
    -------
    fraction : ndarray of float
        In [0, 1], broadcast shape of ``z`` and ``p``; 0 where p = 0.

    Notes
    -----
    For |1 - p| < z < 1 + p the lens-shaped overlap has area
    A = p^2 k0 + k1 - sqrt(4 z^2 - (1 + z^2 - p^2)^2) / 2 with
    cos k0 = (p^2 + z^2 - 1) / (2 p z) and cos k1 = (1 - p^2 + z^2) / (2 z);
    A = pi min(1, p)^2 for z <= |1 - p| and 0 for z >= 1 + p (Mandel & Agol
    2002, eq. 1).

    References
    ----------
    Mandel, K. & Agol, E. 2002, ApJ 580, L171.
    """
    z = _check_positive("z", z, allow_zero=True)
    p = _check_positive("p", p, allow_zero=True)
    z, p = np.broadcast_arrays(z, p)
    area = _overlap_area(z, p)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(p > 0, area / (np.pi * np.where(p > 0, p, 1.0) ** 2), 0.0)
    return np.clip(frac, 0.0, 1.0)


def _overlap_area(z, p):
    """Area of overlap of the unit disk and a disk of radius p at distance z."""
    zs = np.where(z > 0, z, 1.0)
    ps = np.where(p > 0, p, 1.0)
    c0 = np.clip((p * p + z * z - 1.0) / (2.0 * ps * zs), -1.0, 1.0)
    c1 = np.clip((1.0 - p * p + z * z) / (2.0 * zs), -1.0, 1.0)
    root = np.sqrt(np.clip(4.0 * z * z - (1.0 + z * z - p * p) ** 2, 0.0, None))
    lens = p * p * np.arccos(c0) + np.arccos(c1) - 0.5 * root
    inside = z <= np.abs(1.0 - p)
    outside = z >= 1.0 + p
    full = np.pi * np.minimum(1.0, p) ** 2
    return np.where(outside, 0.0, np.where(inside, full, lens))


@lru_cache(maxsize=8)
def _gauss_theta(n_nodes):
    # Cached: the nodes come from an eigenvalue problem, costlier than a short light curve.
    x, w = np.polynomial.legendre.leggauss(n_nodes)
    theta, weight = 0.5 * np.pi * (x + 1.0), 0.5 * np.pi * w
    theta.flags.writeable = False
    weight.flags.writeable = False
    return theta, weight


def limb_darkened_blocked_fraction(z, p, u1, u2, *, n_nodes=_DEFAULT_NODES):
    """Fraction of a quadratically limb-darkened star's flux that a disk hides.

    Parameters
    ----------
    z : array_like of float
        Centre-to-centre separation in stellar radii, >= 0.
    p : array_like of float
        Planet-to-star radius ratio, >= 0.
    u1, u2 : array_like of float
        Quadratic limb-darkening coefficients,
        I(mu) / I(1) = 1 - u1 (1 - mu) - u2 (1 - mu)^2.
    n_nodes : int, optional
        Gauss-Legendre nodes across the annuli cut by the planet's rim
        (keyword-only); cost is linear in it.

    Returns
    -------
    fraction : ndarray of float
        In [0, 1], broadcast shape of the inputs.  The side of the star is
        not considered here.

    Notes
    -----
    The total flux of the disk is pi (1 - u1/3 - u2/6).  With
    I = A + B mu + C mu^2 (A = 1 - u1 - u2, B = u1 + 2 u2, C = -u2) the disk
    wholly covered, r < R0 = min(1, p - z), emits
    2 pi [A (1 - m^2)/2 + B (1 - m^3)/3 + C (1 - m^4)/4] with m = sqrt(1 - R0^2);
    the annuli cut by the rim are integrated numerically (module docstring).

    References
    ----------
    Mandel, K. & Agol, E. 2002, ApJ 580, L171.
    """
    if int(n_nodes) < 8:
        raise ParameterError("n_nodes must be an integer >= 8")
    z = _check_positive("z", z, allow_zero=True)
    p = _check_positive("p", p, allow_zero=True)
    u1 = np.asarray(u1, dtype=float)
    u2 = np.asarray(u2, dtype=float)
    z, p, u1, u2 = np.broadcast_arrays(z, p, u1, u2)
    shape = z.shape
    z, p, u1, u2 = (np.ravel(v) for v in (z, p, u1, u2))
    ca, cb, cc = 1.0 - u1 - u2, u1 + 2.0 * u2, -u2
    norm = np.pi * (1.0 - u1 / 3.0 - u2 / 6.0)

    # Whole-covered central disk.
    r0 = np.clip(p - z, 0.0, 1.0)
    m = np.sqrt(np.clip(1.0 - r0 * r0, 0.0, None))
    full = 2.0 * np.pi * (ca * (1.0 - m ** 2) / 2.0 + cb * (1.0 - m ** 3) / 3.0
                          + cc * (1.0 - m ** 4) / 4.0)

    # Annuli cut by the planet's rim.
    a = np.abs(z - p)
    b = np.minimum(1.0, z + p)
    cut = (a < b) & (p > 0)
    partial = np.zeros_like(z)
    if np.any(cut):
        theta, weight = _gauss_theta(int(n_nodes))
        ac, bc, zc, pc = a[cut, None], b[cut, None], z[cut, None], p[cut, None]
        half = 0.5 * (bc - ac)
        r = ac + half * (1.0 - np.cos(theta))
        dr = half * np.sin(theta)
        cos_k = (r * r + zc * zc - pc * pc) / (2.0 * r * zc)
        kappa = np.arccos(np.clip(cos_k, -1.0, 1.0))
        mu = np.sqrt(np.clip(1.0 - r * r, 0.0, None))
        inten = ca[cut, None] + cb[cut, None] * mu + cc[cut, None] * mu * mu
        partial[cut] = np.sum(weight * inten * 2.0 * r * kappa * dr, axis=1)
    frac = np.clip((full + partial) / norm, 0.0, 1.0)
    return frac.reshape(shape)


def transit_flux(time, *, t0, period, rp_rs, a_rs, inclination, u1, u2):
    """Relative flux of a transit of a quadratically limb-darkened star.

    Parameters
    ----------
    time : array_like of float
        Times in days (BJD_TDB).
    t0 : float
        Mid-transit time in days (BJD_TDB).
    period : float
        Orbital period in days, > 0.
    rp_rs : float or array_like
        Planet-to-star radius ratio, >= 0; broadcasts against ``time``
        (e.g. shape (1, n_channels) against times of shape (n_times, 1)).
    a_rs : float
        Semi-major axis in stellar radii, > 0.
    inclination : float
        Orbital inclination in degrees.
    u1, u2 : float or array_like
        Quadratic limb-darkening coefficients.

    Returns
    -------
    flux : ndarray of float
        1 out of transit and whenever the planet is behind the star; the
        broadcast shape of the inputs.

    References
    ----------
    Mandel, K. & Agol, E. 2002, ApJ 580, L171.
    """
    geom = orbit_geometry(time, t0=t0, period=period, a_rs=a_rs, inclination=inclination)
    rp_rs = _check_positive("rp_rs", rp_rs, allow_zero=True)
    z, front, p, u1, u2 = np.broadcast_arrays(geom.z, geom.in_front, rp_rs,
                                               np.asarray(u1, float), np.asarray(u2, float))
    flux = np.ones(z.shape)
    near = front & (z < 1.0 + p)
    if np.any(near):
        flux[near] = 1.0 - limb_darkened_blocked_fraction(z[near], p[near], u1[near], u2[near])
    return flux


def eclipse_flux(time, *, t0, period, rp_rs, a_rs, inclination, fp_fs):
    """Relative flux of star plus planet through a secondary eclipse.

    Parameters
    ----------
    time : array_like of float
        Times in days (BJD_TDB).
    t0 : float
        Mid-TRANSIT time in days (BJD_TDB); the eclipse is at t0 + period/2.
    period : float
        Orbital period in days, > 0.
    rp_rs : float or array_like
        Planet-to-star radius ratio, >= 0.
    a_rs : float
        Semi-major axis in stellar radii, > 0.
    inclination : float
        Orbital inclination in degrees.
    fp_fs : float or array_like
        Planet-to-star flux ratio of the whole planetary disk.

    Returns
    -------
    flux : ndarray of float
        1 + fp_fs * visible_fraction: 1 + fp_fs out of eclipse, 1 at full
        eclipse, and 1 + fp_fs whenever the planet is in front of the star
        (no transit is included).  Broadcast shape of the inputs.

    Notes
    -----
    The planet is a uniform disk; the hidden fraction is
    :func:`occulted_fraction_uniform` (z, p).
    """
    geom = orbit_geometry(time, t0=t0, period=period, a_rs=a_rs, inclination=inclination)
    rp_rs = _check_positive("rp_rs", rp_rs, allow_zero=True)
    fp_fs = np.asarray(fp_fs, dtype=float)
    z, front, p, fp = np.broadcast_arrays(geom.z, geom.in_front, rp_rs, fp_fs)
    hidden = np.where(front, 0.0, occulted_fraction_uniform(z, p))
    return 1.0 + fp * (1.0 - hidden)
