"""Systematics basis columns: plain functions of per-exposure arrays.

Each function returns design-matrix columns (dimensionless, without the
constant column) for one kind of instrument systematic: a visit-long
polynomial in time, an orbit-phase polynomial shared by all orbits, a
per-orbit exponential ramp and the offset between scan directions.  The
components of :mod:`lightledger.pipeline.syscomponents` wrap them for a
:class:`~lightledger.pipeline.sysmodel.SystematicsModel`.

Times are days.  Masks do not enter: columns are evaluated on every exposure.
Inputs are not modified.
"""

import numpy as np

from .argchecks import vector as _vector, order as _order
from .errors import ParameterError

__all__ = ["polynomial_basis", "orbit_phase_basis", "ramp_basis", "scan_direction_basis",
           "DEFAULT_TAU_GRID"]

#: Default ramp time scales, days (1 to 60 minutes, log-spaced).
DEFAULT_TAU_GRID = np.geomspace(1.0, 60.0, 16) / 1440.0


def _scaled(t):
    t = np.asarray(t, dtype=float)
    lo, hi = np.nanmin(t), np.nanmax(t)
    half = 0.5 * (hi - lo)
    return (t - 0.5 * (hi + lo)) / (half if half > 0 else 1.0)



def polynomial_basis(time, order):
    """Visit-long polynomial in time, without the constant.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        Days.
    order : int
        Highest power, >= 0 (0 gives no column).

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, order)
        ``x**k`` for k = 1..order with ``x`` the time mapped onto [-1, 1]
        over the visit (for conditioning).
    """
    t = _vector(time, "time")
    k = _order(order, "order")
    x = _scaled(t)
    return x[:, None] ** np.arange(1, k + 1)[None, :]


def orbit_phase_basis(orbit_time, order):
    """Polynomial in time since the orbit's start, shared by all orbits.

    Parameters
    ----------
    orbit_time : array_like of float, shape (n_exposures,)
        Days since the start of each exposure's orbit.
    order : int
        Highest power, >= 0.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, order)
        ``x**k``, k = 1..order, with ``x`` = orbit_time / max(orbit_time).

    References
    ----------
    Berta et al. 2012, ApJ 747, 35 (orbit-phase systematics).
    """
    t = _vector(orbit_time, "orbit_time")
    k = _order(order, "order")
    top = np.nanmax(t) if t.size else 1.0
    x = t / (top if top > 0 else 1.0)
    return x[:, None] ** np.arange(1, k + 1)[None, :]


def ramp_basis(orbit_time, orbit, tau):
    """Per-orbit exponential ramp, one column per orbit.

    The systematics ``a_0 + r_o exp(-t_orb / tau)`` in orbit ``o`` equal
    ``(a_0 + r_o) - r_o (1 - exp(-t_orb / tau))``: with the constant column in
    the fit, these columns span the ramp ``1 - exp(-t_orb / tau)`` with a
    free amplitude in each orbit.

    Parameters
    ----------
    orbit_time : array_like of float, shape (n_exposures,)
        Days since the start of the exposure's orbit.
    orbit : array_like of int, shape (n_exposures,)
        Orbit number of each exposure.
    tau : float
        Time scale, days, > 0.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, n_orbits)
        Column ``o`` is ``exp(-orbit_time / tau)`` in orbit ``o`` and 0
        elsewhere, for each distinct orbit number in increasing order.

    References
    ----------
    Kreidberg et al. 2014, Nature 505, 69; Zhou et al. 2017, AJ 153, 243.
    """
    t = _vector(orbit_time, "orbit_time")
    o = np.asarray(orbit)
    if o.shape != t.shape:
        raise ParameterError(f"orbit must have the shape of orbit_time {t.shape}; got {o.shape}")
    if not (np.isfinite(tau) and tau > 0):
        raise ParameterError(f"tau must be a finite time in days > 0; got {tau!r}")
    labels = np.unique(o)
    return np.exp(-t / tau)[:, None] * (o[:, None] == labels[None, :])


def scan_direction_basis(direction):
    """Offset between the two scan directions.

    Parameters
    ----------
    direction : array_like, shape (n_exposures,)
        Scan direction sign of each exposure (e.g. the sign of the scan
        speed): > 0 forward, <= 0 reverse.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, 1) or (n_exposures, 0)
        1 for forward exposures, 0 otherwise; no column when all exposures
        share one direction.
    """
    d = _vector(direction, "direction")
    fwd = (d > 0).astype(float)
    if np.all(fwd == fwd[0]) if fwd.size else True:
        return np.zeros((d.size, 0))
    return fwd[:, None]

