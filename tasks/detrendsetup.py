"""What the detrend fits take: the stage's parameters mapped onto the fits' arguments.

The model grid of a visit (:func:`grid_setup`: model strings, light curves with
their masks, covariates, incident rates for the charge-trapping ramp, limb
darkening, the options of :func:`lightledger.pipeline.grid.fit_grid`), the
single model of a fit that takes one (:func:`systematics_setup`), the models a
phase-curve fit tries (:func:`phase_grid_models`), the exposures and channels
every fit leaves out (:func:`left_out_rows`, :func:`channel_exclusions`) and
the a priori event shape (:func:`event_template`).  Used by the detrend task
(:mod:`.detrend`) and the phase-curve fits (:mod:`.phasecurve`).
"""

import warnings

import numpy as np

from lightledger.pipeline.detrend import tied_phase_curve
from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.grid import Curves
from lightledger.pipeline.limbfit import table_limb_darkening
from lightledger.pipeline.modelspec import (DEFAULT_PHASE_SCAN_GRID, DEFAULT_PHASE_STARE_GRID,
                                            DEFAULT_SCAN_GRID, DEFAULT_STARE_GRID, parse_grid)
from lightledger.pipeline.systematics import PhaseSinusoids, SystematicsInputs, SystematicsModel
from lightledger.pipeline.whitelight import event_template as _event_template

__all__ = ["event_template", "grid_setup", "white_share", "white_parts", "left_out_rows", "phase_grid_models", "SINGLE_MODEL",
           "systematics_setup", "channel_exclusions"]


def event_template(bjd, event):
    """Unit event shape from the a priori ephemeris, and what one unit of depth means.

    Transit: ``s = (1 - model) / rp_rs**2`` so that the fitted depth is the
    (rp/rs)^2 of a uniform-disk-equivalent transit. Eclipse: ``s`` is the
    hidden fraction of the planet (0 out of eclipse, 1 in full eclipse), so
    the fitted depth is fp / (1 + fp).
    """
    return _event_template(bjd, event)


def _wants_phase_curve(setting, event, bjd):
    if setting == "auto":
        return event["kind"] == "eclipse" and np.ptp(bjd) > 0.1 * event["period"]
    return setting == "on"


def _median_rate(flux, pixels, exposure_time, relative):
    """Smooth incident rate per pixel: the median flux shaped by the a priori event."""
    with np.errstate(divide="ignore", invalid="ignore"):
        level = np.nanmedian(flux / relative[:, None], axis=0)
    return relative[:, None] * (level / pixels)[None, :] / exposure_time[:, None]


def grid_setup(lc, channels, event, params):
    """Everything :func:`lightledger.pipeline.grid.fit_grid` needs for a visit.

    Maps the detrend stage's parameters onto the grid: the model strings
    (default grid for scans or stares), the light curves with their masks
    (flux outliers and, when asked, the first orbit of a multi-orbit visit
    left out), the covariates (drifts, width, background, exposure times and
    starts) and the incident rate per pixel of each light curve for the
    charge-trapping ramp (the median flux over the pixels that collected it:
    channel columns times the scanned band's rows, or the trace's equivalent
    width sqrt(2 pi) sigma for a stare).

    Returns
    -------
    (specs, curves, options, stare)
        ``options`` are keyword arguments of ``fit_grid``.
    """
    t = np.asarray(lc["time_bjd_tdb"], float)
    n = t.size
    orbit = np.asarray(lc["orbit"], int)
    stare = bool(np.all(np.asarray(lc["scan_direction"]) == 0))
    specs = parse_grid(params["models"] or (DEFAULT_STARE_GRID if stare else DEFAULT_SCAN_GRID))
    texp = (np.asarray(lc["exposure_time"], float) if "exposure_time" in lc.colnames
            else np.full(n, np.nan))
    covariates = {name: np.asarray(lc[name], float) for name in ("dx", "dy", "width", "background")}
    covariates["exposure_time"] = texp
    covariates["exposure_start"] = (t - t[0]) * 86400.0 - 0.5 * texp
    inputs = SystematicsInputs(t, orbit=orbit, orbit_time=np.asarray(lc["orbit_time"], float),
                               scan_direction=None if stare
                               else np.asarray(lc["scan_direction"], float),
                               covariates=covariates)
    joint = params["fit"] == "joint"
    phase = (event["t0"], event["period"]) if _wants_phase_curve(params["phase_curve"], event, t) \
        and event["kind"] != "phase-curve" else None   # a phase-curve event models the planet itself
    tie = (phase is not None and event["kind"] == "eclipse" and joint
           and params["phase_curve_model"] == "planet")
    event_options = dict(mode="joint" if joint else "out_of_event")
    extra = ()
    if tie:
        event_options.update(tied_phase_curve(t, *phase))
    elif phase is not None:
        extra = (PhaseSinusoids(float(phase[0]), float(phase[1])),)
    left_out = _left_out(orbit, params, stare)
    bad = np.asarray(lc["flux_outlier"], bool) | left_out
    width = float(np.nanmedian(np.asarray(lc["width"], float)))
    rows = width * np.sqrt(2 * np.pi) if stare else width
    n_pix = (np.asarray(channels["n_pixels"], float) if channels is not None
             else np.ones(np.shape(lc["flux"])[1]))
    pixels = n_pix * max(rows, 1.0)
    depth0 = event["rp_rs"] ** 2 if event["kind"] == "transit" else 0.0
    relative = 1.0 - depth0 * np.nan_to_num(_event_template(t, event))
    wf = np.asarray(lc["white_flux"], float)
    we = np.asarray(lc["white_error"], float)
    F = np.asarray(lc["flux"], float)
    E = np.asarray(lc["error"], float)
    white_rate = _median_rate(wf[:, None], np.array([pixels.sum()]), texp, relative)[:, 0]
    rate = _median_rate(F, pixels, texp, relative)
    share = white_share(channels)
    curves = Curves(inputs, wf, we ** 2, bad | np.asarray(lc["white_mask"], bool), F, E ** 2,
                    np.asarray(lc["mask"], bool) | bad[:, None],
                    white_rate=white_rate if np.all(np.isfinite(white_rate)) else None,
                    rate=rate if np.all(np.isfinite(rate)) else None,
                    white_share=share, white_parts=white_parts(F, rate, share))
    ref = float(np.nanmedian(white_rate)) if np.any(np.isfinite(white_rate)) else None
    ld = None
    if params["limb_darkening"] == "table" and channels is not None:
        if "ld_wavelength" not in event:
            raise LightledgerError("detrend.limb_darkening = 'table' needs the visit's [event] "
                                   "ld_wavelength, ld_u1 and ld_u2")
        ld = table_limb_darkening(np.asarray(channels["wave_mid"], float), event["ld_wavelength"],
                                  event["ld_u1"], event["ld_u2"])
    options = dict(event_options=event_options, extra_components=extra,
                   free=tuple(params["white_free"]), criterion=params["criterion"],
                   error_kind=params["depth_errors"], n_shifts=params["permutation_shifts"],
                   stare=stare, reference_rate=ref if ref and ref > 0 else None, channel_ld=ld,
                   ld_prior=params["limb_darkening_prior"]
                   if params["limb_darkening"] == "fit" else None)
    return specs, curves, options, stare


def white_parts(flux, rate, share=None):
    """The white band's parts for its charge-trapping ramp: the channels' rates and shares.

    Each channel's pixels trap at the channel's own rate; its share of the
    white light's electrons is its median flux times the fraction of it
    inside the white band.  Channels without a finite rate or flux are left
    out.  None when fewer than two channels remain (the white light's one
    rate is then used).

    Returns
    -------
    (ndarray, ndarray) or None
        Rates per pixel (n_exposures, n_parts) and shares (n_parts,).
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)      # a channel with no finite flux
        level = np.nanmedian(np.asarray(flux, float), axis=0)
    rate = np.asarray(rate, float)
    w = level * (1.0 if share is None else np.asarray(share, float))
    keep = np.isfinite(w) & (w > 0) & np.all(np.isfinite(rate), axis=0) & np.all(rate > 0, axis=0)
    if np.count_nonzero(keep) < 2:
        return None
    return rate[:, keep], w[keep] / w[keep].sum()


def white_share(channels):
    """Fraction of each channel's wavelength range inside the white band, or None (all)."""
    if channels is None or "white_band_um" not in channels.meta:
        return None
    lo, hi = channels.meta["white_band_um"]
    a, b = np.asarray(channels["wave_lo"], float), np.asarray(channels["wave_hi"], float)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = (np.clip(np.minimum(b, hi) - np.maximum(a, lo), 0.0, None) / (b - a))
    return np.where(np.isfinite(share), np.clip(share, 0.0, 1.0), 1.0)


def left_out_rows(lc, params):
    """The exposures of ``lc`` the detrend parameters leave out of every fit (the first orbit)."""
    stare = bool(np.all(np.asarray(lc["scan_direction"]) == 0))
    return _left_out(np.asarray(lc["orbit"], int), params, stare)


def phase_grid_models(lc, params):
    """The models a phase-curve fit tries, and a warning line per model it cannot.

    ``detrend.models``, or the default phase-curve grid for scans or stares;
    common-mode models are left out (a joint fit of the planet has no white
    light fitted first to divide out), with a warning naming them.

    Returns
    -------
    (names, warnings) : (tuple of str, list of str)
    """
    stare = bool(np.all(np.asarray(lc["scan_direction"]) == 0))
    specs = parse_grid(params["models"] or (DEFAULT_PHASE_STARE_GRID if stare
                                            else DEFAULT_PHASE_SCAN_GRID))
    names = tuple(s.name for s in specs if not s.common_mode)
    dropped = [s.name for s in specs if s.common_mode]
    warnings = ([f"detrend.models: common-mode models are not fitted to a phase curve "
                 f"(no white light is divided out of a joint fit): {', '.join(dropped)}"]
                if dropped else [])
    if not names:
        raise LightledgerError("detrend.models: a phase curve needs at least one model without "
                               "a common-mode token (cm-sys, cm-res)")
    return names, warnings


def _left_out(orbit, params, stare):
    """The first orbit of a visit of three orbits or more, when detrend.drop_first_orbit."""
    drop = params["drop_first_orbit"] and not stare and len(np.unique(orbit)) > 2
    return orbit == np.min(orbit) if drop else np.zeros(orbit.size, bool)


#: The model of fits that take a single systematics model when detrend.models is empty.
SINGLE_MODEL = {"scan": "visit1+orbit2+scan+ramp", "stare": "visit1+ramp"}


def systematics_setup(lc, event, params):
    """One systematics model for a fit that takes a single model (e.g. a programme's joint fit).

    The first model of ``detrend.models``, or :data:`SINGLE_MODEL` when it is
    empty, built as :func:`grid_setup` builds the grid's (inputs with the
    drifts, width, background, exposure times and the white light's incident
    rate for a charge-trapping ramp).

    Returns
    -------
    (inputs, model, event_options, left_out)
        :class:`~lightledger.pipeline.systematics.SystematicsInputs`, the
        :class:`~lightledger.pipeline.systematics.SystematicsModel`, the
        options of :func:`~lightledger.pipeline.eventfit.fit_event` (mode,
        the planet's phase-curve columns) and the exposures left out (the
        first orbit, when asked).
    """
    stare = bool(np.all(np.asarray(lc["scan_direction"]) == 0))
    one = dict(params)
    one["models"] = (params["models"][0],) if params["models"] else \
        (SINGLE_MODEL["stare" if stare else "scan"],)
    specs, curves, options, stare = grid_setup(lc, None, event, one)
    model = specs[0].systematics(reference_rate=options["reference_rate"], stare=stare)
    model = SystematicsModel(model.components + tuple(options["extra_components"]))
    return (curves.white_inputs(), model, dict(options["event_options"]),
            _left_out(np.asarray(lc["orbit"], int), params, stare))


def channel_exclusions(visit, n_channels):
    """{channel: note} of the channels the visit description excludes (``[exclude] channels``)."""
    notes = {}
    for first, last, reason in (getattr(visit, "exclude", None) or {}).get("channels", ()):
        for j in range(first, min(last, n_channels - 1) + 1):
            notes[j] = ("not fitted: excluded by the visit description (exclude.channels)"
                        + (f": {reason}" if reason else ""))
    return notes
