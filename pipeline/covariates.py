"""Per-exposure covariates of a visit: orbits, orbit phase, exposure flags.

Times are in days on any continuous scale (BJD_TDB from
:mod:`lightledger.pipeline.timing`, or MJD); durations returned are in days.
An exposure flag is a boolean column, True where the exposure has that
property; ``flux_outlier`` is True for an exposure to leave out (the project's
mask contract: True = bad).  Inputs are not modified.

Orbits: a spacecraft in low Earth orbit loses the target for part of each
orbit, so the exposures come in groups separated by gaps much longer than the
cadence (common practice).  A continuous stare is one "orbit".
"""

from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from .errors import AllMaskedError, ParameterError

__all__ = ["Covariates", "orbit_numbers", "running_median_outliers", "exposure_covariates"]

_MAD_TO_SIGMA = 1.4826  # MAD x 1.4826 = sigma of a normal distribution (common practice)


@dataclass(frozen=True)
class Covariates:
    """Covariates of each exposure; returned by :func:`exposure_covariates`.

    Attributes
    ----------
    orbit : ndarray of int, shape (n_exposures,)
        Orbit number, 0 for the first orbit of the visit.
    orbit_time : ndarray of float, shape (n_exposures,)
        Days from the start of the exposure's orbit (start time of its first
        exposure) to the exposure's time (mid time when given): the orbit
        phase in time units.
    visit_time : ndarray of float, shape (n_exposures,)
        Days from the visit's first start time to the exposure's time.
    first_orbit : ndarray of bool, shape (n_exposures,)
        True in orbit 0.
    first_in_orbit : ndarray of bool, shape (n_exposures,)
        True for the first exposure of each orbit.
    flux_outlier : ndarray of bool, shape (n_exposures,)
        True where the white-light flux deviates from its running median by
        more than the threshold, or is not finite; all False when no flux was
        given.
    n_orbits : int
    gap_threshold : float
        The gap (days, start to start) above which a new orbit began.
    """

    orbit: np.ndarray
    orbit_time: np.ndarray
    visit_time: np.ndarray
    first_orbit: np.ndarray
    first_in_orbit: np.ndarray
    flux_outlier: np.ndarray
    n_orbits: int
    gap_threshold: float

    def columns(self):
        """Per-exposure columns as a dict of name to array (e.g. for a table)."""
        return {"orbit": self.orbit, "orbit_time": self.orbit_time,
                "visit_time": self.visit_time, "first_orbit": self.first_orbit,
                "first_in_orbit": self.first_in_orbit, "flux_outlier": self.flux_outlier}


def _times(values, name):
    t = np.asarray(values, dtype=float)
    if t.ndim != 1 or t.size < 1 or not np.all(np.isfinite(t)):
        raise ParameterError(f"{name} must be a non-empty 1-D array of finite times (days)")
    if np.any(np.diff(t) <= 0):
        raise ParameterError(f"{name} must be strictly increasing (exposures in time order)")
    return t


def orbit_numbers(start_time, *, gap_factor=10.0, gap_minutes=None, stare=False):
    """Number the orbits of a visit by splitting at long gaps.

    Parameters
    ----------
    start_time : array_like of float, shape (n_exposures,)
        Exposure start times, days, strictly increasing.
    gap_factor : float, optional
        A start-to-start interval longer than ``gap_factor`` times the median
        interval begins a new orbit (default 10).  Used when ``gap_minutes``
        is None.
    gap_minutes : float, optional
        A fixed threshold in minutes instead of ``gap_factor``.
    stare : bool, optional
        True: continuous staring, the whole visit is one orbit.

    Returns
    -------
    orbit : ndarray of int, shape (n_exposures,)
    gap_threshold : float
        Threshold used, days (inf for a stare or a single exposure).
    """
    t = _times(start_time, "start_time")
    if stare or t.size < 2:
        return np.zeros(t.size, dtype=int), np.inf
    dt = np.diff(t)
    if gap_minutes is not None:
        if not (np.isfinite(gap_minutes) and gap_minutes > 0):
            raise ParameterError(f"gap_minutes must be a finite number of minutes > 0; got {gap_minutes!r}")
        threshold = float(gap_minutes) / 1440.0
    else:
        if not (np.isfinite(gap_factor) and gap_factor > 1):
            raise ParameterError(f"gap_factor must be a finite number > 1; got {gap_factor!r}")
        threshold = float(gap_factor) * float(np.median(dt))
    orbit = np.concatenate([[0], np.cumsum(dt > threshold)]).astype(int)
    return orbit, threshold


def running_median_outliers(flux, groups=None, *, window=7, n_sigma=5.0, side="both"):
    """Flag values that deviate from a running median, robustly.

    Non-finite values are flagged (True) and do not enter the statistics.

    Parameters
    ----------
    flux : array_like of float, shape (n_exposures,)
        E.g. the white-light flux of each exposure.
    groups : array_like of int, shape (n_exposures,), optional
        The running median does not cross a change of group (e.g. orbit).
    window : int, optional
        Odd number of exposures spanned by the running median, the tested one
        included (default 7).
    n_sigma : float, optional
        Threshold in units of the robust scatter of the residuals
        (1.4826 x median absolute deviation), default 5.
    side : {"both", "low", "high"}
        "low" flags only drops (e.g. a sudden loss of flux).

    Returns
    -------
    outlier : ndarray of bool, shape (n_exposures,)

    Notes
    -----
    Each value is compared with the median of its ``window - 1`` neighbours
    (itself left out), with nearest-value padding at the ends of each group;
    the threshold is ``n_sigma`` times 1.4826 x MAD of those residuals over all
    groups.  Cost O(n_exposures * window).
    """
    f = np.asarray(flux, dtype=float)
    if f.ndim != 1:
        raise ParameterError(f"flux must be 1-D; got shape {f.shape}")
    w = int(window)
    if w < 3 or w % 2 == 0 or w != window:
        raise ParameterError(f"window must be an odd integer >= 3; got {window!r}")
    if not (np.isfinite(n_sigma) and n_sigma > 0):
        raise ParameterError(f"n_sigma must be a finite number > 0; got {n_sigma!r}")
    if side not in ("both", "low", "high"):
        raise ParameterError(f"side must be 'both', 'low' or 'high'; got {side!r}")
    g = np.zeros(f.size, dtype=int) if groups is None else np.asarray(groups)
    if g.shape != f.shape:
        raise ParameterError(f"groups must have the shape of flux {f.shape}; got {g.shape}")
    good = np.isfinite(f)
    if not np.any(good):
        raise AllMaskedError("flux has no finite value")
    resid = np.full(f.size, np.nan)
    # Loop over groups (a handful of orbits), not over exposures.
    for label in np.unique(g):
        idx = np.flatnonzero((g == label) & good)
        if idx.size == 0:
            continue
        if idx.size == 1:
            resid[idx] = 0.0
            continue
        # Median of the neighbours, leaving the exposure itself out, so that the
        # residual is independent of the value tested (with the centre included,
        # about 1 in `window` residuals is exactly 0 and the MAD is biased low).
        half = w // 2
        padded = np.pad(f[idx], half, mode="edge")
        windows = sliding_window_view(padded, 2 * half + 1)
        neighbours = np.delete(windows, half, axis=1)
        resid[idx] = f[idx] - np.median(neighbours, axis=1)
    r = resid[good]
    sigma = _MAD_TO_SIGMA * np.median(np.abs(r - np.median(r)))
    if sigma == 0:
        sigma = np.finfo(float).tiny
    z = np.where(good, resid / sigma, 0.0)
    if side == "both":
        out = np.abs(z) > n_sigma
    elif side == "low":
        out = z < -n_sigma
    else:
        out = z > n_sigma
    return out | ~good


def exposure_covariates(start_time, mid_time=None, *, white_flux=None, stare=False,
                        gap_factor=10.0, gap_minutes=None, outlier_window=7,
                        outlier_sigma=5.0, outlier_side="both"):
    """Orbit number, orbit and visit time, and exposure flags for a visit.

    ``flux_outlier`` is True (bad) where ``white_flux`` is not finite or
    deviates from its running median within the orbit; inputs are not
    modified.

    Parameters
    ----------
    start_time : array_like of float, shape (n_exposures,)
        Exposure start times, days, strictly increasing.
    mid_time : array_like of float, shape (n_exposures,), optional
        Mid-exposure times, days; the times at which ``orbit_time`` and
        ``visit_time`` are evaluated.  Default: ``start_time``.
    white_flux : array_like of float, shape (n_exposures,), optional
        White-light flux for the outlier flag.
    stare : bool, optional
        Continuous stare: one orbit.
    gap_factor, gap_minutes
        See :func:`orbit_numbers`.
    outlier_window, outlier_sigma, outlier_side
        ``window``, ``n_sigma`` and ``side`` of :func:`running_median_outliers`.

    Returns
    -------
    Covariates
    """
    t0 = _times(start_time, "start_time")
    if mid_time is None:
        tm = t0
    else:
        tm = np.asarray(mid_time, dtype=float)
        if tm.shape != t0.shape or not np.all(np.isfinite(tm)) or np.any(tm < t0):
            raise ParameterError("mid_time must be finite, of the shape of start_time, "
                                 "and not earlier than start_time")
    orbit, threshold = orbit_numbers(t0, gap_factor=gap_factor, gap_minutes=gap_minutes,
                                     stare=stare)
    first_in_orbit = np.concatenate([[True], orbit[1:] != orbit[:-1]])
    n_orbits = int(orbit[-1]) + 1
    orbit_start = t0[first_in_orbit][orbit]
    if white_flux is None:
        outlier = np.zeros(t0.size, dtype=bool)
    else:
        wf = np.asarray(white_flux, dtype=float)
        if wf.shape != t0.shape:
            raise ParameterError(f"white_flux must have shape {t0.shape}; got {wf.shape}")
        outlier = running_median_outliers(wf, orbit, window=outlier_window,
                                          n_sigma=outlier_sigma, side=outlier_side)
    return Covariates(orbit=orbit, orbit_time=tm - orbit_start, visit_time=tm - t0[0],
                      first_orbit=orbit == 0, first_in_orbit=first_in_orbit,
                      flux_outlier=outlier, n_orbits=n_orbits,
                      gap_threshold=float(threshold))
