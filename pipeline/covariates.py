"""Per-exposure covariates of a visit: orbits, orbit phase, exposure flags.

Times are in days on any continuous scale (BJD_TDB from
:mod:`lightledger.pipeline.timing`, or MJD); durations returned are in days.
An exposure flag is a boolean column, True where the exposure has that
property; ``flux_outlier`` is True for an exposure to leave out (the project's
mask contract: True = bad).  Inputs are not modified.

Orbits: a spacecraft in low Earth orbit loses the target for part of each
orbit, so the exposures come in groups separated by gaps longer than any
interval within an orbit (common practice); :func:`split_orbits` finds the
break between the two populations of intervals.  A continuous stare is one
"orbit".
"""

from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from .errors import AllMaskedError, ParameterError

__all__ = ["Covariates", "OrbitSplit", "split_orbits", "orbit_numbers", "running_median_outliers", "exposure_covariates"]

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
    orbit_note : str
        Empty when the split into orbits is clear, else why it is ambiguous
        (:class:`OrbitSplit`).
    """

    orbit: np.ndarray
    orbit_time: np.ndarray
    visit_time: np.ndarray
    first_orbit: np.ndarray
    first_in_orbit: np.ndarray
    flux_outlier: np.ndarray
    n_orbits: int
    gap_threshold: float
    orbit_note: str = ""

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


#: Intervals within this ratio of each other are one population (timing jitter): a
#: longest interval less than this much longer than the cadence is no occultation gap.
SAME_RATIO = 1.1
#: A split is clear when the shortest gap is at least this many times the longest
#: within-orbit interval ...
CLEAR_RATIO = 1.5
#: ... and the jump between the populations (in log interval) is at least this many times
#: the spread of the within-orbit intervals (jitter, buffer dumps) in log interval.
CLEAR_SPREAD = 2.0


@dataclass(frozen=True)
class OrbitSplit:
    """The visit's exposures split into orbits; returned by :func:`split_orbits`.

    Attributes
    ----------
    orbit : ndarray of int, shape (n_exposures,)
        Orbit number, 0 for the first orbit of the visit.
    n_orbits : int
    threshold : float
        Start-to-start interval (days) above which a new orbit began (inf when
        the visit is one orbit).
    rule : str
        ``"stare"`` (a continuous stare), ``"minutes"`` (the observer's
        ``gap_minutes``), ``"factor"`` (``gap_factor`` x the median interval)
        or ``"intervals"`` (the automatic rule).
    within : float
        Longest start-to-start interval taken as within an orbit, days (nan when
        there is none).
    gap : float
        Shortest interval taken as an occultation gap, days (nan when none).
    note : str
        Empty when the split is clear; otherwise one line saying why it is
        ambiguous (for the product's warnings).
    """

    orbit: np.ndarray
    n_orbits: int
    threshold: float
    rule: str
    within: float = float("nan")
    gap: float = float("nan")
    note: str = ""


def _minutes(days):
    return f"{days * 1440.0:.3g} min"


def _split_at(t, threshold, rule, note=""):
    dt = np.diff(t)
    orbit = np.concatenate([[0], np.cumsum(dt > threshold)]).astype(int)
    inside, across = dt[dt <= threshold], dt[dt > threshold]
    return OrbitSplit(orbit=orbit, n_orbits=int(orbit[-1]) + 1, threshold=float(threshold),
                      rule=rule, within=float(inside.max()) if inside.size else float("nan"),
                      gap=float(across.min()) if across.size else float("nan"), note=note)


def _one_orbit(t, rule, note="", within=float("nan")):
    return OrbitSplit(orbit=np.zeros(t.size, dtype=int), n_orbits=1, threshold=np.inf,
                      rule=rule, within=within, note=note)


def _orbits_fit_their_period(t, orbit):
    """True when no orbit's exposures span longer than the spacing of orbit starts.

    In a low orbit the target is visible for part of each revolution, so the
    exposures of one orbit span less than the time from one orbit's start to
    the next (common practice); "gaps" that break this are no occultations.
    """
    first = np.flatnonzero(np.r_[True, orbit[1:] != orbit[:-1]])
    last = np.r_[first[1:] - 1, t.size - 1]
    span = t[last] - t[first]
    spacing = np.median(np.diff(t[first]))
    return bool(np.all(span < spacing))


def split_orbits(start_time, *, gap_minutes=None, gap_factor=None, stare=False):
    """Split a visit's exposures into spacecraft orbits at the occultation gaps.

    A spacecraft in low Earth orbit loses the target behind the Earth for part
    of each revolution, so the intervals between exposure starts fall into two
    well-separated populations: the cadence (with occasional modestly longer
    intervals, e.g. buffer dumps) and the occultation gaps (common practice).
    By default the break between the two is found from the intervals alone,
    whatever the cadence and the number of exposures per orbit.

    Parameters
    ----------
    start_time : array_like of float, shape (n_exposures,)
        Exposure start times, days, finite and strictly increasing.
    gap_minutes : float, optional
        The observer's override: a start-to-start interval longer than this
        many minutes begins a new orbit.
    gap_factor : float, optional
        Instead, an interval longer than ``gap_factor`` (> 1) times the median
        interval begins a new orbit (a fixed rule that fails when an orbit
        holds few exposures; kept for explicit use).
    stare : bool, optional
        True: continuous staring, the whole visit is one orbit.

    Returns
    -------
    OrbitSplit
        ``note`` is non-empty when the automatic split is ambiguous.

    Notes
    -----
    The automatic rule sorts the n - 1 start-to-start intervals s_0 <= ... and
    looks for the break between s_i and s_(i+1) that best separates them in
    log interval: the jump g_i = ln(s_(i+1) / s_i) minus the spread of the
    intervals below it above the cadence, w_i = ln(s_i / s_m) (s_m the lower
    median: jitter and buffer dumps), is largest.  Only breaks at or above the
    median are candidates: every orbit holds at least two exposures, so at
    least half of the intervals lie within orbits.
    The threshold is the geometric mean sqrt(s_i s_(i+1)).  Then

    * g < ln(SAME_RATIO): the intervals are one population; one orbit;
    * g <= w: no clear break (the long intervals merge into the spread of
      the short ones); one orbit, with a note;
    * otherwise the visit is split; the split is clear when
      s_(i+1) / s_i >= CLEAR_RATIO and g >= CLEAR_SPREAD w, else it is kept with
      a note.  A split in which some orbit's exposures span longer than the
      median spacing of orbit starts (impossible for occultation gaps) is
      refused: one orbit, with a note.  A clear split whose orbits start
      closer together than any Earth orbit's period
      (:func:`shortest_orbit_period`) is kept with a note.

    A visit whose intervals show a clear break below the median (as many long
    intervals as short ones: orbits of one or two exposures) is one orbit with
    a note: the times alone cannot say which intervals are the gaps.  Cost
    O(n log n).
    """
    t = _times(start_time, "start_time")
    if stare:
        return _one_orbit(t, "stare")
    if gap_minutes is not None:
        if not (np.isfinite(gap_minutes) and gap_minutes > 0):
            raise ParameterError(f"gap_minutes must be a finite number of minutes > 0; got {gap_minutes!r}")
        return _split_at(t, float(gap_minutes) / 1440.0, "minutes")
    if gap_factor is not None:
        if not (np.isfinite(gap_factor) and gap_factor > 1):
            raise ParameterError(f"gap_factor must be a finite number > 1; got {gap_factor!r}")
        if t.size < 2:
            return _one_orbit(t, "factor")
        return _split_at(t, float(gap_factor) * float(np.median(np.diff(t))), "factor")
    if t.size < 3:
        return _one_orbit(t, "intervals")
    s = np.sort(np.diff(t))
    logs = np.log(s)
    lower_median = (s.size - 1) // 2
    jump = np.diff(logs)                      # g_i, between s_i and s_(i+1)
    # w_i: how far the intervals below the break reach above the cadence (the median)
    spread = np.abs(logs[:-1] - logs[lower_median])
    score = jump - spread
    i = lower_median + int(np.argmax(score[lower_median:]))
    g, w = float(jump[i]), float(spread[i])
    described = (f"start-to-start intervals {_minutes(s[0])} to {_minutes(s[i])} within "
                 f"orbits and {_minutes(s[i + 1])} to {_minutes(s[-1])} across gaps "
                 f"(ratio {s[i + 1] / s[i]:.3g})")
    if g < np.log(SAME_RATIO):
        k = int(np.argmax(jump[:lower_median])) if lower_median > 0 else 0
        if (lower_median > 0 and jump[k] >= np.log(CLEAR_RATIO)
                and jump[k] >= CLEAR_SPREAD * (logs[k] - logs[0])):
            return _one_orbit(t, "intervals", within=float(s[-1]), note=(
                f"orbits: the start-to-start intervals form two populations, "
                f"{_minutes(s[0])} to {_minutes(s[k])} and {_minutes(s[k + 1])} to "
                f"{_minutes(s[-1])}, the longer as numerous as the shorter (orbits of one "
                f"or two exposures?): the times alone cannot tell the occultation gaps; "
                f"taken as one orbit"))
        return _one_orbit(t, "intervals", within=float(s[-1]))
    if g <= w:
        return _one_orbit(t, "intervals", within=float(s[-1]), note=(
            f"orbits: no clear break between the cadence and the occultation gaps "
            f"(start-to-start intervals from {_minutes(s[0])} to {_minutes(s[-1])}, "
            f"largest step {_minutes(s[i])} to {_minutes(s[i + 1])}); taken as one orbit"))
    threshold = float(np.sqrt(s[i] * s[i + 1]))
    split = _split_at(t, threshold, "intervals")
    if not _orbits_fit_their_period(t, split.orbit):
        return _one_orbit(t, "intervals", within=float(s[-1]), note=(
            f"orbits: splitting at {_minutes(threshold)} ({described}) would make orbits "
            f"that last longer than the spacing of their starts, so these are no "
            f"occultation gaps; taken as one orbit"))
    if s[i + 1] / s[i] < CLEAR_RATIO or g < CLEAR_SPREAD * w:
        return _split_at(t, threshold, "intervals", note=(
            f"orbits: the split into {split.n_orbits} orbits at {_minutes(threshold)} is "
            f"ambiguous: {described}"))
    spacing = float(np.median(np.diff(t[np.r_[True, split.orbit[1:] != split.orbit[:-1]]])))
    if spacing < shortest_orbit_period():
        return _split_at(t, threshold, "intervals", note=(
            f"orbits: the split into {split.n_orbits} orbits at {_minutes(threshold)} "
            f"({described}) makes orbits {_minutes(spacing)} apart, shorter than any orbit "
            f"around the Earth ({_minutes(shortest_orbit_period())}): buffer dumps rather "
            f"than occultations?"))
    return split


def shortest_orbit_period():
    """Period of a circular orbit grazing the Earth's equatorial radius, days.

    2 pi sqrt(R^3 / GM) (Kepler's third law) with astropy.constants' R_earth
    and GM_earth: 84.5 min.  No spacecraft in Earth orbit goes round faster, so
    orbits closer together than this are not occultations by the Earth.
    """
    from astropy import constants

    seconds = 2 * np.pi * np.sqrt(constants.R_earth.value ** 3 / constants.GM_earth.value)
    return seconds / 86400.0


def orbit_numbers(start_time, *, gap_factor=None, gap_minutes=None, stare=False):
    """Number the orbits of a visit by splitting at its occultation gaps.

    The orbit numbers and threshold of :func:`split_orbits` (which see, also
    for the parameters and for the automatic rule used when neither
    ``gap_minutes`` nor ``gap_factor`` is given).

    Returns
    -------
    orbit : ndarray of int, shape (n_exposures,)
    gap_threshold : float
        Threshold used, days (inf for a stare or a visit of one orbit).
    """
    split = split_orbits(start_time, gap_factor=gap_factor, gap_minutes=gap_minutes, stare=stare)
    return split.orbit, split.threshold


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
                        gap_factor=None, gap_minutes=None, outlier_window=7,
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
        See :func:`split_orbits` (neither: the automatic rule).
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
    split = split_orbits(t0, gap_factor=gap_factor, gap_minutes=gap_minutes, stare=stare)
    orbit = split.orbit
    first_in_orbit = np.concatenate([[True], orbit[1:] != orbit[:-1]])
    n_orbits = split.n_orbits
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
                      gap_threshold=float(split.threshold), orbit_note=split.note)
