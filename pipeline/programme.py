"""Phase curves of a programme of visits: every channel fitted, and what fitters take.

:func:`fit_programme` fits the white light curve and every channel of one or
more visits of a planet with :func:`~lightledger.pipeline.jointfit.fit_joint`
(per-visit systematics, one planet per channel).  From the fits:

* :func:`planet_flux_points`: per exposure, the planet's flux relative to the
  star measured from the data, ``flux / systematics - (1 - blocked)`` (0 in
  full eclipse), with its error and the model beside it;
* :func:`phase_resolved_spectrum`: that flux averaged in bins of orbital
  phase, per channel, out of transits and eclipses;
* :func:`consistency`: each visit fitted alone against the joint fit.

Pure functions on arrays; masks are True where an exposure is bad; inputs are
not modified.  Fluxes are relative to the star's (star alone = 1).
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError
from .jointfit import VisitData, fit_joint

__all__ = ["VisitCurves", "ProgrammeFit", "fit_programme", "orbital_phase",
           "PlanetPoints", "planet_flux_points", "PhaseBins", "phase_resolved_spectrum",
           "QUANTITIES", "quantity", "consistency"]


@dataclass(frozen=True)
class VisitCurves:
    """One visit's light curves and systematics model.

    Attributes
    ----------
    inputs : SystematicsInputs
    model : SystematicsModel
    white_flux, white_variance : ndarray of float, shape (n_exposures,)
    white_mask : ndarray of bool, shape (n_exposures,)
    flux, variance : ndarray of float, shape (n_exposures, n_channels)
    mask : ndarray of bool, shape (n_exposures, n_channels)
    name : str
    """

    inputs: object
    model: object
    white_flux: np.ndarray
    white_variance: np.ndarray
    white_mask: np.ndarray
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    name: str = ""


@dataclass(frozen=True)
class ProgrammeFit:
    """Fits of the white band and every channel; returned by :func:`fit_programme`.

    Attributes
    ----------
    white : JointFit
    channels : tuple of JointFit
    """

    white: object
    channels: tuple


def fit_programme(visits, planet, *, progress=None):
    """Fit the white light curve and every channel of the visits jointly.

    Parameters
    ----------
    visits : sequence of VisitCurves
        All with the same number of channels.
    planet : PlanetModel
    progress : callable, optional
        ``progress(done, total)`` after each fit.

    Returns
    -------
    ProgrammeFit

    Notes
    -----
    Each channel is its own joint fit (its own systematics per visit, its own
    planet); cost n_channels + 1 times :func:`fit_joint`.
    """
    visits = tuple(visits)
    if not visits:
        raise ParameterError("give at least one visit")
    n_ch = {v.flux.shape[1] for v in visits}
    if len(n_ch) != 1:
        raise ParameterError("every visit must have the same channels")
    n_ch = n_ch.pop()
    total = n_ch + 1

    def one(get):
        data = []
        for v in visits:
            flux, variance, mask = get(v)
            data.append(VisitData(v.inputs, flux, variance, v.model, mask=mask, name=v.name))
        return fit_joint(data, planet)

    white = one(lambda v: (v.white_flux, v.white_variance, v.white_mask))
    if progress is not None:
        progress(1, total)
    chans = []
    for j in range(n_ch):
        chans.append(one(lambda v: (v.flux[:, j], v.variance[:, j], v.mask[:, j])))
        if progress is not None:
            progress(j + 2, total)
    return ProgrammeFit(white=white, channels=tuple(chans))


def orbital_phase(time, t0, period):
    """Orbital phase in cycles from mid-transit, in [0, 1).

    Parameters
    ----------
    time : array_like of float
        BJD_TDB, days.
    t0, period : float
        Mid-transit time and period, days.
    """
    return np.mod((np.asarray(time, dtype=float) - t0) / period, 1.0)


@dataclass(frozen=True)
class PlanetPoints:
    """Per-exposure planet flux of every visit, concatenated in visit order.

    Attributes
    ----------
    visit : ndarray of int, shape (n,)
        Visit index.
    time, phase : ndarray of float, shape (n,)
        BJD_TDB (days) and orbital phase (cycles from mid-transit).
    planet_flux, planet_error : ndarray of float, shape (n,)
        ``detrended - (1 - blocked)``: the planet's visible flux over the
        star's, and its error (scaled by the fit's ``error_scale``).
    model : ndarray of float, shape (n,)
        The model's visible planet flux, :math:`F_p v`.
    visible, blocked : ndarray of float, shape (n,)
    used : ndarray of bool, shape (n,)
        True where the exposure entered the fit.
    in_event : ndarray of bool, shape (n,)
        True during a transit or an eclipse.
    """

    visit: np.ndarray
    time: np.ndarray
    phase: np.ndarray
    planet_flux: np.ndarray
    planet_error: np.ndarray
    model: np.ndarray
    visible: np.ndarray
    blocked: np.ndarray
    used: np.ndarray
    in_event: np.ndarray


def planet_flux_points(fit, times, t0, period):
    """The planet's flux measured at every exposure of a joint fit.

    Parameters
    ----------
    fit : JointFit
    times : sequence of ndarray
        Each visit's times, BJD_TDB days.
    t0, period : float
        Ephemeris for the orbital phase.

    Returns
    -------
    PlanetPoints

    Notes
    -----
    With :math:`d = f/S` the detrended flux (star alone = 1) and the model
    :math:`d = 1 - \\lambda + F_p v`, the planet's visible flux is
    :math:`d - (1 - \\lambda)` with the variance of :math:`d`; the transit's
    :math:`\\lambda` comes from the fitted radius ratio.
    """
    parts = []
    for k, (vf, t) in enumerate(zip(fit.visits, times)):
        t = np.asarray(t, dtype=float)
        with np.errstate(invalid="ignore"):
            fp_model = vf.astro - (1.0 - vf.blocked)
        parts.append(dict(visit=np.full(t.size, k), time=t, phase=orbital_phase(t, t0, period),
                          planet_flux=vf.detrended - (1.0 - vf.blocked),
                          planet_error=vf.detrended_error * fit.error_scale, model=fp_model,
                          visible=vf.visible, blocked=vf.blocked, used=~vf.fit_mask,
                          in_event=(vf.blocked > 0) | (vf.visible < 1)))
    return PlanetPoints(**{key: np.concatenate([p[key] for p in parts]) for key in parts[0]})


@dataclass(frozen=True)
class PhaseBins:
    """Planet flux in bins of orbital phase; returned by :func:`phase_resolved_spectrum`.

    Attributes
    ----------
    lo, hi, mid : ndarray of float, shape (n_bins,)
        Bin edges and centres, cycles from mid-transit.
    flux, error : ndarray of float, shape (n_bins, n_channels)
        Inverse-variance weighted mean planet flux over the star's (NaN in
        an empty bin) and its error.
    model : ndarray of float, shape (n_bins, n_channels)
        The fitted planet flux averaged over the same exposures.
    count : ndarray of int, shape (n_bins, n_channels)
        Exposures averaged.
    """

    lo: np.ndarray
    hi: np.ndarray
    mid: np.ndarray
    flux: np.ndarray
    error: np.ndarray
    model: np.ndarray
    count: np.ndarray


def phase_resolved_spectrum(points, edges):
    """Average the planet's flux in orbital-phase bins, per channel.

    Parameters
    ----------
    points : sequence of PlanetPoints
        One per channel (same exposures).
    edges : array_like of float, shape (n_bins + 1,)
        Increasing bin edges in cycles from mid-transit, within [0, 1].

    Returns
    -------
    PhaseBins

    Notes
    -----
    Only exposures that entered the fit and lie outside transits and
    eclipses are averaged (in an event the planet's flux is entangled with
    the event's shape).  The mean is :math:`\\sum w_i y_i / \\sum w_i` with
    :math:`w_i = 1/\\sigma_i^2`, its error :math:`(\\sum w_i)^{-1/2}`
    (independent exposures).  The uncertainty of the star's level, common to
    every bin of a visit, is not included (it is in the fit's covariance).
    """
    e = np.asarray(edges, dtype=float).ravel()
    if e.size < 2 or np.any(np.diff(e) <= 0) or e[0] < 0 or e[-1] > 1:
        raise ParameterError("phase bin edges must increase within [0, 1] (cycles from "
                             "mid-transit)")
    n_b, n_c = e.size - 1, len(points)
    flux = np.full((n_b, n_c), np.nan)
    err = np.full((n_b, n_c), np.nan)
    model = np.full((n_b, n_c), np.nan)
    count = np.zeros((n_b, n_c), int)
    for j, p in enumerate(points):
        ok = p.used & ~p.in_event & np.isfinite(p.planet_flux) & (p.planet_error > 0)
        idx = np.searchsorted(e, p.phase, side="right") - 1
        for b in range(n_b):      # loop over bins only
            sel = ok & (idx == b)
            if not np.any(sel):
                continue
            w = 1.0 / p.planet_error[sel] ** 2
            flux[b, j] = np.sum(w * p.planet_flux[sel]) / np.sum(w)
            err[b, j] = 1.0 / np.sqrt(np.sum(w))
            model[b, j] = np.mean(p.model[sel])
            count[b, j] = int(sel.sum())
    return PhaseBins(lo=e[:-1], hi=e[1:], mid=0.5 * (e[:-1] + e[1:]), flux=flux, error=err,
                     model=model, count=count)


#: Quantities compared between single-visit and joint fits: (name, meaning).
QUANTITIES = (("transit_depth", "(rp/rs)^2"),
              ("eclipse_depth", "planet flux at mid-eclipse over the star's (day side)"),
              ("night_flux", "planet flux at mid-transit over the star's (night side)"),
              ("amplitude", "peak-to-trough planet flux"),
              ("offset_deg", "hotspot offset, degrees east"))


def quantity(fit, name):
    """(value, error) of a quantity of :data:`QUANTITIES` from a JointFit (NaN if not fitted)."""
    nan = (float("nan"), float("nan"))
    if name == "transit_depth":
        return (fit.transit_depth, fit.transit_depth_error) if fit.fitted_radius else nan
    s = fit.summary
    if s is None:
        return nan
    return {"eclipse_depth": (s.day, s.day_error), "night_flux": (s.night, s.night_error),
            "amplitude": (s.amplitude, s.amplitude_error),
            "offset_deg": (s.offset_deg, s.offset_error_deg)}[name]


def consistency(alone, joint):
    """Chi-square of the single-visit fits about the joint fit, per quantity.

    Parameters
    ----------
    alone : sequence of JointFit
        Each visit fitted by itself.
    joint : JointFit

    Returns
    -------
    dict of str to (float, int)
        Quantity name -> (chi-square, number of visits that measured it).

    Notes
    -----
    :math:`\\chi^2 = \\sum_v (x_v - x_J)^2 / \\sigma_v^2` over the visits that
    measured the quantity (common practice; the joint value is not
    independent of the visits', so with one visit the expectation is below
    1 per term).
    """
    out = {}
    for name, _ in QUANTITIES:
        xj = quantity(joint, name)[0]
        terms = []
        for fit in alone:
            x, s = quantity(fit, name)
            if np.isfinite(x) and np.isfinite(s) and s > 0 and np.isfinite(xj):
                d = x - xj
                if name == "offset_deg":
                    d = (d + 180.0) % 360.0 - 180.0
                terms.append((d / s) ** 2)
        out[name] = (float(np.sum(terms)) if terms else float("nan"), len(terms))
    return out
