"""The full-orbit event model: transits, eclipses and the planet's phase curve.

Relative to the star alone, the flux of star plus planet is

.. math:: E(t) = 1 - \\lambda(z; p, u_1, u_2) + F_p(\\xi)\\, v(z; p),

with :math:`\\lambda` the fraction of the limb-darkened star hidden by the
planet during a transit (Mandel & Agol 2002), :math:`v` the fraction of the
planet's uniform disk not hidden by the star (1 except during an eclipse),
and the planet's flux over the star's a constant plus harmonics of the
orbital angle from transit :math:`\\xi` (:mod:`lightledger.pipeline.orbit`),

.. math:: F_p(\\xi) = c_0 + \\sum_{k=1}^{h} (a_k \\cos k\\xi + b_k \\sin k\\xi)

(Cowan & Agol 2008; first harmonic by default, second as an option).  Every
transit and eclipse that the ephemeris places in the visit is included, so
one model covers a visit of any length; for an eccentric orbit the eclipse
falls where the ephemeris puts it.  The planet is seen on top of the star
during a transit and hidden during an eclipse; in full eclipse :math:`E = 1`,
the level of the star alone.  The model is linear in the planet's
coefficients and nonlinear only in the radius ratio :math:`p`, which enters
through the limb-darkened transit and the eclipse's ingress itself (never a
template scaled from an a priori radius).

Conventions: :math:`\\xi = 0` at mid-transit, :math:`\\pi` at mid-eclipse.
The night side is :math:`F_p(0)`, the day side :math:`F_p(\\pi)` (the
eclipse depth relative to the star), and the *hotspot offset* is how far the
maximum of :math:`F_p` comes before the eclipse, in degrees of orbital
angle, positive eastward (a maximum before mid-eclipse: Cowan & Agol 2008).

Times are days, fluxes relative to the star.  Inputs are not modified.
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError
from .orbit import Ephemeris, orbit_state
from .phasepost import posterior_draws
from .transit import limb_darkened_blocked_fraction, occulted_fraction_uniform

__all__ = ["planet_columns", "planet_names", "EventShapes", "event_shapes", "full_orbit_flux",
           "PhaseCurveSummary", "summarise_planet", "planet_flux"]


def _harmonics(h):
    k = int(h)
    if k != h or k < 0 or k > 4:
        raise ParameterError(f"harmonics must be an integer 0-4; got {h!r}")
    return k


def planet_columns(angle, harmonics=1):
    """Columns of the planet's flux in orbital angle.

    Parameters
    ----------
    angle : array_like of float, shape (n,)
        Orbital angle from transit, radians.
    harmonics : int, optional
        Number of harmonics h (default 1).

    Returns
    -------
    ndarray of float, shape (n, 1 + 2 h)
        ``1, cos xi, sin xi, cos 2 xi, sin 2 xi, ...``.
    """
    x = np.asarray(angle, dtype=float)
    h = _harmonics(harmonics)
    cols = [np.ones_like(x)]
    for k in range(1, h + 1):
        cols += [np.cos(k * x), np.sin(k * x)]
    return np.stack(cols, axis=-1)


def planet_names(harmonics=1):
    """Names of the columns of :func:`planet_columns`."""
    names = ["planet_c0"]
    for k in range(1, _harmonics(harmonics) + 1):
        names += [f"planet_cos{k}", f"planet_sin{k}"]
    return tuple(names)


def planet_flux(coefficients, angle, harmonics=None):
    """The planet's flux over the star's at orbital angles ``angle`` (radians)."""
    c = np.asarray(coefficients, dtype=float)
    h = (c.size - 1) // 2 if harmonics is None else harmonics
    return planet_columns(angle, h) @ c


@dataclass(frozen=True)
class EventShapes:
    """Transit and eclipse shapes of a visit at one radius ratio.

    Attributes
    ----------
    blocked : ndarray of float, shape (n,)
        :math:`\\lambda`, fraction of the star's flux hidden (transits).
    visible : ndarray of float, shape (n,)
        :math:`v`, fraction of the planet's disk seen (eclipses).
    d_blocked, d_visible : ndarray of float, shape (n,) or None
        Their derivatives with respect to the radius ratio (None when not
        asked for).
    angle : ndarray of float, shape (n,)
        Orbital angle from transit, radians.
    """

    blocked: np.ndarray
    visible: np.ndarray
    d_blocked: np.ndarray
    d_visible: np.ndarray
    angle: np.ndarray


def event_shapes(time, ephemeris, rp_rs, u1, u2, *, state=None, derivatives=True):
    """Transit and eclipse shapes and their radius-ratio derivatives.

    Parameters
    ----------
    time : array_like of float, shape (n,)
        BJD_TDB, days.
    ephemeris : Ephemeris
    rp_rs : float
        Planet-to-star radius ratio, > 0.
    u1, u2 : float
        Quadratic limb darkening of the star.
    state : OrbitState, optional
        The orbit at ``time`` when already computed.
    derivatives : bool, optional
        Compute the radius-ratio derivatives (else they are None).

    Returns
    -------
    EventShapes

    Notes
    -----
    Derivatives by central differences with a step of 1e-6 in the radius
    ratio; the limb-darkened transit is a smooth function of it at fixed
    quadrature nodes (:mod:`lightledger.pipeline.transit`), so the
    derivative is accurate to about 1e-8 relative.

    References
    ----------
    Mandel & Agol 2002, ApJ 580, L171 (transit); the eclipse is the overlap
    of two uniform disks (eq. 1 there).
    """
    if not (np.isfinite(rp_rs) and rp_rs > 0):
        raise ParameterError(f"rp_rs must be a finite radius ratio > 0; got {rp_rs!r}")
    st = orbit_state(time, ephemeris) if state is None else state
    h = 1e-6

    def shapes(p):
        near = st.z < 1.0 + p
        blocked = np.zeros(st.z.shape)
        hidden = np.zeros(st.z.shape)
        tr = near & st.in_front
        if np.any(tr):
            blocked[tr] = limb_darkened_blocked_fraction(st.z[tr], p, u1, u2)
        ec = near & ~st.in_front
        if np.any(ec):
            hidden[ec] = occulted_fraction_uniform(st.z[ec], p)
        return blocked, 1.0 - hidden

    b0, v0 = shapes(float(rp_rs))
    if not derivatives:
        return EventShapes(blocked=b0, visible=v0, d_blocked=None, d_visible=None,
                           angle=st.angle)
    bp, vp = shapes(float(rp_rs) + h)
    bm, vm = shapes(max(float(rp_rs) - h, 0.0))
    step = float(rp_rs) + h - max(float(rp_rs) - h, 0.0)
    return EventShapes(blocked=b0, visible=v0, d_blocked=(bp - bm) / step,
                       d_visible=(vp - vm) / step, angle=st.angle)


def full_orbit_flux(time, ephemeris, rp_rs, u1, u2, coefficients):
    """Flux of star plus planet relative to the star alone.

    Parameters
    ----------
    time : array_like of float, shape (n,)
        BJD_TDB, days.
    ephemeris : Ephemeris
    rp_rs : float
        Radius ratio.
    u1, u2 : float
        Quadratic limb darkening.
    coefficients : array_like of float, shape (1 + 2 h,)
        ``c0, a1, b1, a2, b2, ...`` of the planet's flux (:func:`planet_columns`).

    Returns
    -------
    ndarray of float, shape (n,)
        :math:`1 - \\lambda + F_p v` (module docstring).
    """
    sh = event_shapes(time, ephemeris, rp_rs, u1, u2)
    return 1.0 - sh.blocked + planet_flux(coefficients, sh.angle) * sh.visible


@dataclass(frozen=True)
class PhaseCurveSummary:
    """What a phase curve says about the planet; returned by :func:`summarise_planet`.

    Every value is relative to the star's flux.  The day and night sides are
    the fit's, with errors from the covariance of the coefficients; the
    extremes, the amplitude and the offset are posterior medians with half
    their central 68 % interval (:func:`summarise_planet`).

    Attributes
    ----------
    day, day_error : float
        :math:`F_p(\\pi)`, the day side (the eclipse depth over the star).
    night, night_error : float
        :math:`F_p(0)`, the night side.
    maximum, maximum_error, minimum, minimum_error : float
        Largest and smallest :math:`F_p` over the orbit.
    amplitude, amplitude_error : float
        Peak to trough, ``maximum - minimum``.
    offset_deg, offset_error_deg : float
        Orbital angle by which the maximum precedes mid-eclipse, degrees in
        [-180, 180), positive eastward.
    amplitude_error_lo, amplitude_error_hi : float
        Median minus the 15.9th percentile and 84.1st percentile minus the
        median of the amplitude's draws (both the first-order error when
        there are no draws); ``amplitude_error`` is their mean.
    offset_error_lo_deg, offset_error_hi_deg : float
        The same for the offset, degrees (about the draws' circular mean).
    """

    day: float
    day_error: float
    night: float
    night_error: float
    maximum: float
    maximum_error: float
    minimum: float
    minimum_error: float
    amplitude: float
    amplitude_error: float
    offset_deg: float
    offset_error_deg: float
    amplitude_error_lo: float = float("nan")
    amplitude_error_hi: float = float("nan")
    offset_error_lo_deg: float = float("nan")
    offset_error_hi_deg: float = float("nan")


def _extrema(c):
    """(maximum, minimum, angle of maximum) of F_p over the orbit."""
    h = (c.size - 1) // 2
    if h == 0:
        return c[0], c[0], np.pi
    if h == 1:
        amp = np.hypot(c[1], c[2])
        return c[0] + amp, c[0] - amp, np.arctan2(c[2], c[1])
    grid = np.linspace(0.0, 2.0 * np.pi, 4097)[:-1]
    f = planet_flux(c, grid)
    out = []
    for sign in (1.0, -1.0):
        i = int(np.argmax(sign * f))
        # Newton refinement of the extremum from the grid point.
        x = grid[i]
        k = np.arange(1, h + 1)
        for _ in range(20):
            d1 = np.sum(k * (-c[1::2] * np.sin(k * x) + c[2::2] * np.cos(k * x)))
            d2 = np.sum(k * k * (-c[1::2] * np.cos(k * x) - c[2::2] * np.sin(k * x)))
            if d2 == 0:
                break
            step = d1 / d2
            x -= step
            if abs(step) < 1e-14:
                break
        out.append((float(planet_flux(c, np.array([x]))[0]), x))
    return out[0][0], out[1][0], out[0][1]


def _offset_deg(angle_max):
    """Degrees by which the maximum precedes mid-eclipse, wrapped into [-180, 180)."""
    off = np.rad2deg(np.pi - angle_max)
    return float((off + 180.0) % 360.0 - 180.0)


def summarise_planet(coefficients, covariance):
    """Day and night sides, extremes, amplitude and hotspot offset with errors.

    Parameters
    ----------
    coefficients : array_like of float, shape (1 + 2 h,)
        ``c0, a1, b1, ...`` (:func:`planet_columns`).
    covariance : array_like of float, shape (1 + 2 h, 1 + 2 h)
        Their covariance.

    Returns
    -------
    PhaseCurveSummary

    Notes
    -----
    With one harmonic, :math:`F_p = c_0 + A\\cos(\\xi - \\xi_m)` with
    :math:`A = \\sqrt{a_1^2 + b_1^2}` and :math:`\\xi_m = \\mathrm{atan2}(b_1, a_1)`,
    so the maximum is :math:`c_0 + A`, the minimum :math:`c_0 - A`, the
    peak-to-trough amplitude :math:`2A` and the offset
    :math:`180° - \\xi_m` (Cowan & Agol 2008).  With more harmonics the
    extremes are found on a grid of angles and refined (Newton steps for the
    fitted coefficients, a parabola through the grid's best three points for
    each draw).

    The day and night sides are linear in the coefficients: their values are
    the fit's and their errors :math:`\\sqrt{g^T C g}`.  The extremes, the
    amplitude and the offset are not: a first harmonic measured with a
    signal-to-noise ratio of a few gives a length biased upwards and an
    angle with wide wings, which first-order errors misstate.  They are the
    median and half the central 68 % interval of 10,000 draws of the
    coefficients from their posterior with uniform priors on the first
    harmonic's amplitude and angle (:func:`lightledger.pipeline.phasepost.
    posterior_draws`; the offset's median and interval about the draws'
    circular mean), with the two distances from the median to the ends of
    that interval beside it (``*_error_lo``, ``*_error_hi``: the interval is
    not symmetric about a Rice-biased length or a wrapped angle).  For a
    well measured curve they agree with first-order
    propagation; for an amplitude consistent with zero the offset's error
    approaches the width of a uniform angle (about 123 degrees).  Without a
    first harmonic, or when its covariance is degenerate, every quantity is
    the fit's with first-order errors (gradients by central differences,
    steps of 1e-3 of each coefficient's standard deviation).
    """
    c = np.asarray(coefficients, dtype=float).ravel()
    C = np.asarray(covariance, dtype=float)
    if c.size % 2 != 1 or C.shape != (c.size, c.size):
        raise ParameterError("coefficients must be c0, a1, b1, ... (odd length) with a square "
                             "covariance of the same size")

    def quantities(x):
        mx, mn, xm = _extrema(x)
        return np.array([planet_flux(x, np.array([np.pi]))[0], planet_flux(x, np.array([0.0]))[0],
                         mx, mn, mx - mn, _offset_deg(xm)])

    q0 = quantities(c)
    lin = _first_order_errors(quantities, c, C, q0)
    err = lin.copy()
    lo, hi = lin.copy(), lin.copy()
    try:
        draws = posterior_draws(c, C)
    except ParameterError:          # no first harmonic, or its covariance is degenerate
        draws = None
    if draws is not None:
        mx, mn, off = _draw_extrema(draws)
        for k, x in ((2, mx), (3, mn), (4, mx - mn)):
            q0[k], lo[k], hi[k] = _median_interval(x)
        q0[5], lo[5], hi[5] = _circular_median_interval(off)
        err[2:] = 0.5 * (lo[2:] + hi[2:])
    return PhaseCurveSummary(day=float(q0[0]), day_error=float(err[0]), night=float(q0[1]),
                             night_error=float(err[1]), maximum=float(q0[2]),
                             maximum_error=float(err[2]), minimum=float(q0[3]),
                             minimum_error=float(err[3]), amplitude=float(q0[4]),
                             amplitude_error=float(err[4]), offset_deg=float(q0[5]),
                             offset_error_deg=float(err[5]), amplitude_error_lo=float(lo[4]),
                             amplitude_error_hi=float(hi[4]), offset_error_lo_deg=float(lo[5]),
                             offset_error_hi_deg=float(hi[5]))


def _first_order_errors(quantities, c, C, q0):
    """sqrt(g^T C g) of each quantity, g by central differences."""
    sd = np.sqrt(np.clip(np.diag(C), 0.0, None))
    G = np.zeros((q0.size, c.size))
    for j in range(c.size):
        h = 1e-3 * sd[j] if sd[j] > 0 else 1e-9
        up, dn = c.copy(), c.copy()
        up[j] += h
        dn[j] -= h
        diff = quantities(up) - quantities(dn)
        diff[5] = (diff[5] + 180.0) % 360.0 - 180.0     # angles wrap
        G[:, j] = diff / (2 * h)
    return np.sqrt(np.clip(np.einsum("ij,jk,ik->i", G, C, G), 0.0, None))


def _draw_extrema(draws, n_angle=720):
    """Maximum, minimum and offset (deg) of F_p for each row of coefficient draws."""
    h = (draws.shape[1] - 1) // 2
    if h == 1:
        A = np.hypot(draws[:, 1], draws[:, 2])
        return (draws[:, 0] + A, draws[:, 0] - A,
                _offset_deg_array(np.arctan2(draws[:, 2], draws[:, 1])))
    grid = 2 * np.pi * np.arange(n_angle) / n_angle
    step = grid[1]
    cols = planet_columns(grid, h)                     # (n_angle, 1 + 2 h)
    out = []
    for sign in (1.0, -1.0):
        vals, where = [], []
        for a in range(0, draws.shape[0], 2000):       # blocks of draws bound the memory
            f = sign * (draws[a:a + 2000] @ cols.T)
            i = np.argmax(f, axis=1)
            r = np.arange(f.shape[0])
            y0, y1, y2 = f[r, i - 1], f[r, i], f[r, (i + 1) % n_angle]
            den = y0 - 2 * y1 + y2
            # parabola through the grid's best point and its neighbours
            dx = np.where(den < 0, 0.5 * (y0 - y2) / np.where(den < 0, den, -1.0), 0.0)
            x = grid[i] + dx * step
            x = _newton_extremum(draws[a:a + 2000], x, h)
            vals.append(np.einsum("nk,nk->n", draws[a:a + 2000], planet_columns(x, h)))
            where.append(x)
        out.append((np.concatenate(vals), np.concatenate(where)))
    return out[0][0], out[1][0], _offset_deg_array(out[0][1])


def _newton_extremum(c, x, h, steps=3):
    """Newton steps towards the extremum of F_p near angles ``x``, one per row of ``c``."""
    k = np.arange(1, h + 1)[None, :]
    a, b = c[:, 1::2], c[:, 2::2]
    for _ in range(steps):
        kx = k * x[:, None]
        d1 = np.sum(k * (-a * np.sin(kx) + b * np.cos(kx)), axis=1)
        d2 = np.sum(k * k * (-a * np.cos(kx) - b * np.sin(kx)), axis=1)
        x = x - np.where(d2 != 0, d1 / np.where(d2 != 0, d2, 1.0), 0.0)
    return x


def _offset_deg_array(angle_max):
    return (np.rad2deg(np.pi - angle_max) + 180.0) % 360.0 - 180.0


def _median_interval(x):
    """Median of draws, and its distances to the ends of their central 68.27 % interval."""
    lo, mid, hi = np.percentile(x, [15.865, 50.0, 84.135])
    return float(mid), float(mid - lo), float(hi - mid)


def _circular_median_interval(deg):
    """:func:`_median_interval` of angles (deg), about their circular mean."""
    rad = np.deg2rad(deg)
    centre = np.rad2deg(np.arctan2(np.mean(np.sin(rad)), np.mean(np.cos(rad))))
    d = (np.asarray(deg) - centre + 180.0) % 360.0 - 180.0
    mid, lo, hi = _median_interval(d)
    return float((centre + mid + 180.0) % 360.0 - 180.0), lo, hi

