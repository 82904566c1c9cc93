"""Where the source's charge lands: staring and spatially scanned traces.

The cross-dispersion profile is a Gaussian of sigma ``psf_sigma`` rows,
integrated over each pixel row (row j spans j - 1/2 .. j + 1/2 in the
coordinate of the trace centre).  A scan moves the centre at a constant
speed; the charge a pixel holds at time t is the time integral of the
pixel-integrated profile, done analytically (below), so a scan conserves the
source's electrons exactly: summed over rows it equals rate x time whenever
the trace stays inside the subarray.
"""

import numpy as np
from scipy.special import erf, ndtr

from lightledger.pipeline.errors import ParameterError

__all__ = ["row_fraction", "stare_rate", "scan_charge"]

_SQRT2PI = np.sqrt(2.0 * np.pi)


def row_fraction(centre, psf_sigma, n_rows):
    """Fraction of a Gaussian profile falling in each pixel row.

    Parameters
    ----------
    centre : array_like of float, shape (n_columns,)
        Trace centre of each column, in subarray rows.
    psf_sigma : float
        Gaussian sigma, rows.
    n_rows : int

    Returns
    -------
    ndarray of float, shape (n_rows, n_columns)
        Phi((j + 1/2 - c) / s) - Phi((j - 1/2 - c) / s).
    """
    centre = np.asarray(centre, dtype=float)
    edges = np.arange(n_rows + 1)[:, None] - 0.5
    cdf = 0.5 * (1.0 + erf((edges - centre[None, :]) / (np.sqrt(2.0) * psf_sigma)))
    return np.diff(cdf, axis=0)


def stare_rate(spectrum, centre, psf_sigma, n_rows):
    """Source electron rate per pixel of a staring trace.

    Parameters
    ----------
    spectrum : array_like of float, shape (n_columns,)
        Source electrons per second in each column (all rows).
    centre : array_like of float, shape (n_columns,)
        Trace centre per column, subarray rows.
    psf_sigma : float
        Cross-dispersion Gaussian sigma, rows.
    n_rows : int

    Returns
    -------
    ndarray of float, shape (n_rows, n_columns), e-/s
    """
    return np.asarray(spectrum, dtype=float)[None, :] * row_fraction(centre, psf_sigma, n_rows)


def _g(u):
    """Antiderivative of the normal CDF: int Phi du = u Phi(u) + phi(u)."""
    return u * ndtr(u) + np.exp(-0.5 * u * u) / _SQRT2PI


def scan_charge(spectrum, start_centre, velocity, psf_sigma, n_rows, times):
    """Cumulative source charge of a trace scanned along the rows.

    Parameters
    ----------
    spectrum : array_like of float, shape (n_columns,)
        Source electrons per second of each column (all rows).
    start_centre : array_like of float, shape (n_columns,)
        Trace centre at time 0 (the zero read), subarray rows.
    velocity : float
        Scan speed in rows per second, signed; 0 gives a stare.
    psf_sigma : float
        Cross-dispersion Gaussian sigma, rows.
    n_rows : int
    times : array_like of float, shape (n_reads,)
        Times after the zero read, s (>= 0).

    Returns
    -------
    ndarray of float, shape (n_reads, n_rows, n_columns)
        Electrons accumulated in each pixel from time 0 to each time.

    Notes
    -----
    With the centre at c(t) = c0 + v t, pixel row j collects
    S int_0^t [Phi((j + 1/2 - c(t')) / s) - Phi((j - 1/2 - c(t')) / s)] dt'.
    Substituting u = (e - c(t')) / s for a row edge e gives
    int_0^t Phi(u(t')) dt' = (s / v) [G(u(0)) - G(u(t))], with
    G(u) = u Phi(u) + phi(u) the antiderivative of Phi.  Summed over all rows
    the edge terms telescope to S t (conservation) as long as the profile is
    inside the rows.
    """
    if psf_sigma <= 0:
        raise ParameterError("psf_sigma must be > 0 rows")
    spectrum = np.asarray(spectrum, dtype=float)
    start_centre = np.asarray(start_centre, dtype=float)
    times = np.asarray(times, dtype=float)
    if velocity == 0:
        rate = stare_rate(spectrum, start_centre, psf_sigma, n_rows)
        return times[:, None, None] * rate[None]
    edges = (np.arange(n_rows + 1) - 0.5)[None, :, None]          # (1, n_rows+1, 1)
    c0 = start_centre[None, None, :]
    ct = c0 + velocity * times[:, None, None]                       # (n_reads, 1, nx)
    u0 = (edges - c0) / psf_sigma
    ut = (edges - ct) / psf_sigma
    edge_integral = (psf_sigma / velocity) * (_g(u0) - _g(ut))       # int Phi dt per edge
    charge = spectrum[None, None, :] * np.diff(edge_integral, axis=1)
    return np.clip(charge, 0.0, None)
