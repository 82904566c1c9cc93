"""Whether a fitted light curve can be trusted: plausible depth, residuals at the noise.

Two checks on each fitted light curve, vectorised over curves; NaN inputs (a
curve not fitted) give False for both:

* **unphysical depth**: the fraction of the flux an event hides lies in
  [0, 1).  A depth below ``-n_sigma`` times its error is negative beyond its
  errors (no event adds light where the ephemeris puts a transit or an
  eclipse), and a depth of 1 or more hides more than the whole flux.  Either
  means the fit did not measure the event, e.g. a visit without a baseline
  outside the event, where the depth is degenerate with the flux level.
* **residual excess**: the residuals' rms (per degree of freedom) above
  ``factor`` times the rms the errors predict says the model misses
  something large (a damaged calibration, an unmodelled systematic), so the
  depth's error cannot be believed.

Both thresholds are conventions, common practice: ``n_sigma = 3`` is the
usual significance threshold; ``factor = 5`` is several times the photon
noise, above the excess (up to about 3) that a short visit with imperfect
systematics models shows.
"""

from dataclasses import dataclass

import numpy as np

__all__ = ["Plausibility", "assess_fits", "N_SIGMA", "RMS_FACTOR"]

#: A depth below -N_SIGMA times its error is negative beyond its errors.
N_SIGMA = 3.0
#: Residual rms above RMS_FACTOR times the expected rms is an excess.
RMS_FACTOR = 5.0


@dataclass(frozen=True)
class Plausibility:
    """Result of :func:`assess_fits`; arrays of shape (n_curves,).

    Attributes
    ----------
    unphysical : ndarray of bool
        Depth negative beyond ``n_sigma`` errors, or at least 1.
    noisy : ndarray of bool
        Residual rms above ``factor`` times the expected rms.
    reasons : tuple of str
        One line per curve ('' when neither flag is set).
    """

    unphysical: np.ndarray
    noisy: np.ndarray
    reasons: tuple


def assess_fits(depth, depth_error, rms, expected, *, n_sigma=N_SIGMA, factor=RMS_FACTOR):
    """Flag fitted light curves whose depth is unphysical or whose residuals are too large.

    Parameters
    ----------
    depth, depth_error : array_like of float, shape (n_curves,)
        Fraction of the flux hidden by the event and its 1-sigma error.
    rms, expected : array_like of float, shape (n_curves,)
        Residual rms per degree of freedom and the rms expected from the
        errors (same units, e.g. relative flux).
    n_sigma, factor : float
        Thresholds (module notes).

    Returns
    -------
    Plausibility
    """
    d = np.atleast_1d(np.asarray(depth, float))
    e = np.atleast_1d(np.asarray(depth_error, float))
    r = np.atleast_1d(np.asarray(rms, float))
    x = np.atleast_1d(np.asarray(expected, float))
    with np.errstate(invalid="ignore"):
        negative = np.isfinite(d) & np.isfinite(e) & (d < -n_sigma * e)
        whole = np.isfinite(d) & (d >= 1.0)
        noisy = np.isfinite(r) & np.isfinite(x) & (x > 0) & (r > factor * x)
    reasons = []
    for k in range(d.size):
        parts = []
        if negative[k]:
            parts.append(f"depth {d[k] * 1e6:.0f} ppm is negative beyond {n_sigma:g} times its "
                         f"error ({e[k] * 1e6:.0f} ppm): unphysical")
        if whole[k]:
            parts.append(f"depth {d[k] * 1e6:.0f} ppm hides the whole flux or more: unphysical")
        if noisy[k]:
            parts.append(f"residual rms {r[k] * 1e6:.0f} ppm is {r[k] / x[k]:.1f} times the "
                         f"{x[k] * 1e6:.0f} ppm expected from the errors")
        reasons.append("; ".join(parts))
    return Plausibility(unphysical=negative | whole, noisy=noisy, reasons=tuple(reasons))
