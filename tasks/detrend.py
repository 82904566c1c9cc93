"""Detrend stage: a grid of systematics models fitted, ranked and marginalised over.

Every model of the grid (``detrend.models``, or the default grid for scans
or stares; :mod:`lightledger.pipeline.modelspec`) is fitted to the white
light curve first, with the event's mid-time (``detrend.white_free``) and the
systematics' shape parameters free, then to every channel with the white
light's event and shapes, fitting only the channel's linear terms and depth
(:mod:`lightledger.pipeline.grid`).  Each light curve ranks the models by
BIC or AIC and marginalises its depth over them with weights from the
criterion, the error including the spread between models (Gibson 2014;
Wakeford et al. 2016).  Each fit's depth error is computed three ways
(covariance, beta factor, residual permutation); ``detrend.depth_errors``
says which one is marginalised and carried; a channel's errors include what it
inherits from the white light's fit.  For an eclipse fitted jointly, the
phase curve is the planet's own flux hidden by the eclipse.  A
``phase-curve`` visit fits the full-orbit model once per model of its grid
and marginalises every planet quantity (:mod:`lightledger.pipeline.phasegrid`).

Products in ``NOTEBOOK/detrend-IDENT/``:

``detrended.fits``
    DETRENDED (one row per exposure: each light curve divided by the
    systematics of its top-ranked model, errors, systematics and full models,
    residuals), DEPTHS (per channel and the white band as ``channel = -1``:
    the marginalised depth and error, and the top model's fit quality;
    ``fitted`` False for a channel left out, with its ``note``;
    ``unphysical`` for a depth negative beyond three errors or hiding the
    whole flux, ``noisy`` for residuals above five times the expected rms,
    each also a warning in the entry and on the console) and
    GRID (one row per model and light curve: chi-square, BIC, AIC, weight,
    depth, its three errors, shape parameters, the white light's fitted
    event) and COEFFICIENTS (per light curve, its top model's fitted
    parameters with their covariance; :mod:`.detrendmeta`); the table
    headers carry what a fitter needs (:mod:`.metadata`: target, ephemeris,
    geometry, limb darkening, exposure duration; the white light's fitted
    mid-time, a/Rs, inclination);
``grid-models.fits``
    one table per model (MODEL_NN) with that model's detrended light curves;
``detrended.ecsv``, ``depths.ecsv``, ``grid.ecsv``, ``coefficients.ecsv``
    DETRENDED, DEPTHS, GRID and COEFFICIENTS as ECSV, with the same facts
    in their metadata;
``detrend.png``, ``detrend-channels.png``, ``grid.png``
    the white light curve's fit in four views and the spectrum; every channel's
    fit; the models' weights and spectra.
"""

import dataclasses
import time

import luigi
import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.detrend import tied_phase_curve
from lightledger.pipeline.diagnostics import residual_quality
from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.grid import Curves, fit_grid
from lightledger.pipeline.limbfit import table_limb_darkening
from lightledger.pipeline.modelspec import (DEFAULT_PHASE_SCAN_GRID, DEFAULT_PHASE_STARE_GRID,
                                            DEFAULT_SCAN_GRID, DEFAULT_STARE_GRID, parse_grid)
from lightledger.pipeline.plausibility import assess_fits
from lightledger.pipeline.systematics import PhaseSinusoids, SystematicsInputs, SystematicsModel
from lightledger.pipeline.whitelight import event_template as _event_template

from .base import ENTRY_NAME, VisitTask
from .applicability import not_applying, visit_facts
from .detrendmeta import (DEPTHS_COLUMNS, DETRENDED_COLUMNS, GRID_COLUMNS, coefficients_table,
                          describe, event_cards, fitted_event)
from .lightcurves import read_lightcurves, set_aside_rows, usable_rows, wide_table
from .metadata import channel_text, ecsv_meta, fits_cards, set_time_keywords
from .products import table_hdu, write_ecsv, write_fits

__all__ = ["Detrend", "event_template", "grid_setup", "systematics_setup", "star_alone",
           "channel_exclusions", "read_depths", "SINGLE_MODEL", "with_reasons", "left_out_rows"]


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
    curves = Curves(inputs, wf, we ** 2, bad | np.asarray(lc["white_mask"], bool), F, E ** 2,
                    np.asarray(lc["mask"], bool) | bad[:, None],
                    white_rate=white_rate if np.all(np.isfinite(white_rate)) else None,
                    rate=rate if np.all(np.isfinite(rate)) else None)
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


def left_out_rows(lc, params):
    """The exposures of ``lc`` the detrend parameters leave out of every fit (the first orbit)."""
    stare = bool(np.all(np.asarray(lc["scan_direction"]) == 0))
    return _left_out(np.asarray(lc["orbit"], int), params, stare)


#: Why an exposure of the visit is not in the fits, by what left it out.
REASONS = {"outlier": "flux outlier (the white flux departs from its running median)",
           "first_orbit": "first orbit left out (detrend.drop_first_orbit)",
           "white_mask": "white flux unusable (white_mask)",
           "other": "not fitted"}


def with_reasons(det, lc, lc_all, left_out):
    """DETRENDED of the fitted exposures, completed to every exposure of the visit.

    Adds ``set_aside`` and ``reason`` (why the exposure is not ``used``: set
    aside at input with its reason, a flux outlier, the first orbit left
    out, an unusable white flux; '' where used) and a row, NaN-filled, for
    each exposure set aside at input (``lc_all``, the whole LIGHTCURVES).
    """
    used = np.asarray(det["used"], bool)
    flags = (("outlier", np.asarray(lc["flux_outlier"], bool)),
             ("first_orbit", np.asarray(left_out, bool)),
             ("white_mask", np.asarray(lc["white_mask"], bool)))
    reasons = []
    for i in range(len(det)):
        if used[i]:
            reasons.append("")
            continue
        parts = [REASONS[key] for key, flag in flags if flag[i]]
        reasons.append("; ".join(parts) or REASONS["other"])
    det["set_aside"] = np.zeros(len(det), bool)
    det["reason"] = reasons
    out = set_aside_rows(det, lc_all)
    if out is not det:
        aside = ~usable_rows(lc_all)
        out["set_aside"] = aside
        text = np.asarray(lc_all["reason"], str)
        kept = iter(reasons)
        out["reason"] = [f"set aside: {t}" if a else next(kept) for a, t in zip(aside, text)]
    out["set_aside"].description = "True: exposure set aside at input (values NaN)"
    out["reason"].description = "why the exposure is not used; empty when used"
    return out


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


def star_alone(result, kind):
    """The star's flux alone times the systematics, from a single-event fit.

    A transit's out-of-transit level is the star's (the night side's flux is
    not modelled); an eclipse's star alone is the level in full eclipse:
    ``S_*`` when the planet's flux was fitted, else the out-of-eclipse level
    times ``1 - depth`` (the depth is the fraction of the total hidden).
    """
    if kind == "transit":
        return result.systematics
    if result.star is not None:
        return result.star
    return result.systematics * (1.0 - result.depth)


def _event_line(event, template, t_fine, template_fine):
    """The event model on a fine time grid, when it is linear in the event template.

    ``event`` is a fit's event model at the exposures (model / star alone);
    when it equals ``a + b template`` there (to 1e-8), the same relation on
    ``template_fine`` is returned as ``(t_fine, values)``; otherwise None (a
    phase curve, limb darkening of its own...) and the figure draws the model
    through the exposures.
    """
    e = np.asarray(event, float)
    s = np.asarray(template, float)
    ok = np.isfinite(e) & np.isfinite(s)
    if ok.sum() < 3 or np.ptp(s[ok]) <= 0:
        return None
    design = np.c_[np.ones(ok.sum()), s[ok]]
    coef, *_ = np.linalg.lstsq(design, e[ok], rcond=None)
    if np.max(np.abs(design @ coef - e[ok])) > 1e-8:
        return None
    return t_fine, coef[0] + coef[1] * np.asarray(template_fine, float)


def channel_exclusions(visit, n_channels):
    """{channel: note} of the channels the visit description excludes (``[exclude] channels``)."""
    notes = {}
    for first, last, reason in (getattr(visit, "exclude", None) or {}).get("channels", ()):
        for j in range(first, min(last, n_channels - 1) + 1):
            notes[j] = ("not fitted: excluded by the visit description (exclude.channels)"
                        + (f": {reason}" if reason else ""))
    return notes


def read_depths(path):
    """The DEPTHS table of a detrend product."""
    with fits.open(path, memmap=False) as hdul:
        return Table(hdul["DEPTHS"].data)


class Detrend(VisitTask):
    """Fit systematics and event depth of the white and every channel light curve."""

    stage = "detrend"

    def requires(self):
        from .lightcurves import Bin
        return self.stage_task(Bin)

    def output(self):
        return luigi.LocalTarget(str(self.folder / ENTRY_NAME))

    def final_product(self):
        if self.config.event["kind"] == "phase-curve":
            return self.folder / "planet.fits"
        return self.folder / "detrended.fits"

    def run(self):
        started = time.time()
        visit, params = self.config, self.params
        lc_path = self.requires().final_product()
        lc_all, channels = read_lightcurves(lc_path)
        if visit.event["kind"] == "phase-curve":
            return self._run_phase_curve(started, lc_path, lc_all, channels)
        # exposures set aside at input keep their rows in LIGHTCURVES; they are not fitted
        lc = lc_all[usable_rows(lc_all)]
        t = np.asarray(lc["time_bjd_tdb"], float)
        template = event_template(t, visit.event)
        if not np.any(template > 0):
            raise LightledgerError(f"{visit.path}: the {visit.event['kind']} of the ephemeris "
                                   f"(event.t0, event.period) falls outside the visit's exposures")
        specs, curves, options, stare = grid_setup(lc, channels, visit.event, params)
        notes = channel_exclusions(visit, len(channels))
        mask = np.array(curves.mask)
        for j in notes:                     # the observer's excluded channels are not fitted
            mask[:, j] = True
        for j in range(len(channels)):
            if j not in notes and np.all(mask[:, j]):
                notes[j] = "not fitted: every exposure of the channel is masked"
        curves = dataclasses.replace(curves, mask=mask)
        self.progress(0, 1, "model grid")
        grid = fit_grid(specs, curves, visit.event,
                        progress=lambda done, total, text: self.progress(done, total, text),
                        **options)
        n_ch = len(channels)
        kind = visit.event["kind"]
        left_out = left_out_rows(lc, params)
        det = with_reasons(_detrended_table(lc, grid, grid.best, kind), lc, lc_all, left_out)
        depths = _depths_table(lc, channels, grid, visit.event)
        # can the results be trusted? (pipeline/plausibility.py)
        quality = assess_fits(depths["depth"], depths["depth_error"],
                              np.asarray(depths["rms_dof_ppm"], float) * 1e-6,
                              np.asarray(depths["expected_ppm"], float) * 1e-6)
        depths["fitted"] = [int(c) not in notes for c in depths["channel"]]
        depths["unphysical"] = quality.unphysical
        depths["noisy"] = quality.noisy
        depths["note"] = [notes.get(int(c), "") for c in depths["channel"]]
        depths["dim"] = np.r_[False, np.asarray(channels["dim"], bool) if "dim" in channels.colnames
                              else np.zeros(n_ch, bool)]
        describe(depths, DEPTHS_COLUMNS)
        warnings = []
        for c, reason in zip(depths["channel"], quality.reasons):
            if reason:
                label = "white light curve" if c < 0 else f"channel {int(c)}"
                warnings.append(f"{self.folder / 'detrended.fits'}: {label}: {reason}")
        for c, names in zip(depths["channel"], depths["shape_at_edge"]):
            if names and c < 0:         # the channels share the white light's shapes
                warnings.append(f"white light curve: {names} of its top model chosen at the end "
                                f"of the range searched (the grid extended to what the exposures "
                                f"can tell apart): this light curve does not constrain it")
        table = grid_table(grid, channels)
        bands = [(int(r["channel"]), float(r["wave_lo"]), float(r["wave_hi"])) for r in depths]
        coefs = coefficients_table(grid, bands)
        event_fit = fitted_event(grid)

        prov = self.provenance([lc_path])
        folder = self.folder
        fits_path = folder / "detrended.fits"
        texp = (np.asarray(lc["exposure_time"], float) if "exposure_time" in lc.colnames
                else np.full(t.size, np.nan))
        facts = fits_cards(visit, t, texp if np.any(np.isfinite(texp)) else [0.0], n_ch)
        hdus = [table_hdu(det, "DETRENDED"), table_hdu(depths, "DEPTHS"), table_hdu(table, "GRID"),
                table_hdu(coefs, "COEFFICIENTS")]
        for hdu in hdus:
            for key, value, comment in facts + event_cards(event_fit):
                hdu.header[key] = (value, comment)
            hdu.header["LDCHAN"] = (params["limb_darkening"],
                                    "channels' limb darkening (DEPTHS ld_u1, ld_u2)")
        set_time_keywords(hdus[0])
        hdus[1].header["EVENT"] = (visit.event["kind"], "event whose depth was fitted")
        hdus[1].header["DEPTHIS"] = (depths.meta["depth_meaning"], "meaning of the depth column")
        hdus[1].header["CRITERN"] = (grid.criterion.upper(), "criterion weighting the models")
        hdus[1].header["ERRKIND"] = (grid.error_kind, "depth error marginalised and carried")
        hdus[1].header["NMODELS"] = (len(specs), "systematics models in the grid")
        hdus[1].header["NUNPHYS"] = (int(np.sum(depths["unphysical"])),
                                     "curves with an unphysical depth")
        hdus[1].header["NNOISY"] = (int(np.sum(depths["noisy"])),
                                    "curves with residual rms above 5x expected")
        write_fits(fits_path, hdus, prov, header={"TIMESYS": "TDB", "TIMEREF": "SOLARSYSTEM",
                                                   **{k: (v, c) for k, v, c in facts[:4]}})
        models_path = folder / "grid-models.fits"
        model_hdus = []
        for m, spec in enumerate(specs):
            hdu = table_hdu(with_reasons(_detrended_table(lc, grid, np.full(n_ch + 1, m), kind), lc,
                                         lc_all, left_out), f"MODEL_{m:02d}")
            hdu.header["MODEL"] = (spec.name, "systematics model")
            model_hdus.append(hdu)
        write_fits(models_path, model_hdus, prov)
        outputs = [fits_path, models_path]
        meta = ecsv_meta(visit, t, texp if np.any(np.isfinite(texp)) else [0.0], channels)
        meta["time_columns"] = {"time_bjd_tdb": meta["time_columns"]["time_bjd_tdb"]}
        meta["fitted_event"] = event_fit
        meta["channel_limb_darkening"] = params["limb_darkening"]
        for name, tab in (("detrended.ecsv", wide_table(det, n_ch, channels)), ("depths.ecsv", depths),
                          ("grid.ecsv", table), ("coefficients.ecsv", coefs)):
            tab = tab.copy(copy_data=False)
            depth_meta = {k: tab.meta[k] for k in ("depth_meaning", "depth_error") if k in tab.meta}
            tab.meta.update(meta)
            tab.meta.update(depth_meta)
            write_ecsv(folder / name, tab, prov)
            outputs.append(folder / name)
        from .figures import detrend_channels_figure, detrend_figure, grid_figure
        wb = grid.fits[grid.best[0]][0]
        used = ~np.asarray(wb.fit_mask, bool)
        fig = folder / "detrend.png"
        dim = (np.asarray(channels["dim"], bool) if "dim" in channels.colnames
               else np.zeros(n_ch, bool))
        # the event model as a line on a fine grid, at the white light's fitted shape
        shape = {k: float(v) for k, v in
                 grid.white_fits[grid.white_owner[grid.best[0]]].event.items()
                 if k in ("t0", "a_rs", "inclination")}
        t_fine = np.linspace(t.min(), t.max(), 3000)
        tmpl, tmpl_fine = (_event_template(x, visit.event, **shape) for x in (t, t_fine))

        def line(fit):
            with np.errstate(all="ignore"):
                return _event_line(fit.model / star_alone(fit, kind), tmpl, t_fine, tmpl_fine)

        detrend_figure(fig, t, curves.white_flux, np.sqrt(curves.white_variance), wb.model,
                       star_alone(wb, kind), used, np.asarray(depths["wave_mid"][1:]),
                       depths["depth"][1:], depths["depth_error"][1:], visit.event["kind"],
                       lit=~dim, event_line=line(wb),
                       label=f"white band {depths['wave_lo'][0]:.3f}-{depths['wave_hi'][0]:.3f} um")
        fig_channels = folder / "detrend-channels.png"
        c_flux = np.asarray(lc["flux"], float)
        c_err = np.asarray(lc["error"], float)
        c_model, c_star = np.full(c_flux.shape, np.nan), np.full(c_flux.shape, np.nan)
        c_used = np.zeros(c_flux.shape, bool)
        lines = []
        for j in range(n_ch):
            fit = grid.fits[grid.best[1 + j]][1 + j] if grid.best[1 + j] >= 0 else None
            lines.append(None if fit is None else line(fit))
            if fit is not None:
                c_model[:, j], c_star[:, j] = fit.model, star_alone(fit, kind)
                c_used[:, j] = ~np.asarray(fit.fit_mask, bool)
        detrend_channels_figure(fig_channels, t, c_flux, c_err, c_model, c_star, c_used,
                                [channel_text(channels, j) for j in range(n_ch)], dim=dim,
                                event_lines=lines)
        fig2 = folder / "grid.png"
        grid_figure(fig2, [s.name for s in specs], grid.weight, grid.depth, grid.error,
                    np.asarray(depths["wave_mid"][1:]), grid.value, grid.value_error,
                    visit.event["kind"], criterion=grid.criterion)
        w = depths[0]
        order = np.argsort(-grid.weight[:, 0])
        metrics = {"white depth (ppm)": round(float(w["depth"]) * 1e6, 1),
                   "white depth error (ppm)": round(float(w["depth_error"]) * 1e6, 1),
                   "white rms (ppm)": round(float(w["rms_ppm"]), 1),
                   "white rms per degree of freedom (ppm)": round(float(w["rms_dof_ppm"]), 1),
                   "white rms / expected": round(float(w["rms_over_expected"]), 3),
                   "white beta": round(float(w["beta"]), 3) if np.isfinite(w["beta"]) else None,
                   "median channel rms / expected":
                       round(float(np.nanmedian(depths["rms_over_expected"][1:])), 3),
                   "exposures fitted": int(used.sum()),
                   "models": len(specs),
                   f"white light ranking ({grid.criterion.upper()} weight)":
                       [f"{specs[m].name} {grid.weight[m, 0]:.3f}" for m in order[:5]
                        if grid.weight[m, 0] > 0],
                   "channels' top models": sorted({specs[m].name for m in grid.best[1:] if m >= 0}),
                   "depth errors carried": grid.error_kind,
                   "failed fits": len(grid.failures),
                   **({"channels not fitted": {str(j): note for j, note in sorted(notes.items())}}
                      if notes else {})}
        self.progress(1, 1, "model grid")
        facts = visit_facts(scanning=not stare, n_orbits=len(np.unique(np.asarray(lc["orbit"]))),
                            kind=kind, phase_curve=_wants_phase_curve(params["phase_curve"],
                                                                      visit.event, t))
        self.write_entry(self.output().path, [lc_path], outputs, metrics,
                         [fig, fig_channels, fig2], started, warnings=warnings,
                         not_applying=not_applying("detrend", params, facts))

    def _run_phase_curve(self, started, lc_path, lc, channels):
        """A visit with every transit and eclipse and the planet's flux over the orbit."""
        from lightledger.pipeline.phasegrid import fit_phase_grid
        from lightledger.pipeline.programme import fit_programme

        from .phasecurve import planet_model, visit_curves, write_phase_products

        visit, params = self.config, self.params
        planet = planet_model(visit.event, params)
        names, warnings = phase_grid_models(lc, params)
        fits, failures = [], []
        total = len(names) * (len(channels) + 1) + 1
        for m, name in enumerate(names):
            curves = visit_curves(lc, visit.event, dict(params, models=(name,)), visit.name)
            try:
                fits.append(fit_programme([curves], planet, progress=lambda done, _t, m=m: (
                    self.progress(m * (len(channels) + 1) + done, total, f"model {name}"))))
            except (LightledgerError, np.linalg.LinAlgError) as exc:
                fits.append(None)
                failures.append(f"{name}: {exc}")
        grid = fit_phase_grid(fits, names, criterion=params["criterion"], failures=failures)
        band = (float(lc.meta.get("WLO", channels["wave_lo"][0])),
                float(lc.meta.get("WHI", channels["wave_hi"][-1])))
        top = grid.top_fit()
        outputs, figs, metrics = write_phase_products(
            self.folder, self.provenance([lc_path]), top, [lc], channels, band, planet, params,
            names=[visit.name], grid=grid)
        metrics["exposures fitted"] = int(np.sum(~top.white.visits[0].fit_mask))
        self.progress(total, total, "model grid")
        self.write_entry(self.output().path, [lc_path], outputs, metrics, figs, started,
                         warnings=warnings)


def _detrended_table(lc, grid, which, kind):
    """DETRENDED: each light curve c with the fit of model ``which[c]``.

    The light curves keep the whole astrophysical signal: divided by the
    systematics alone and normalised to the star alone (:func:`star_alone`); a
    channel's systematics include any common mode divided out before its fit.
    A model that could not be fitted (more parameters than exposures) gets NaN.
    """
    n_ch = len(which) - 1
    t = np.asarray(lc["time_bjd_tdb"], float)
    wf = np.asarray(lc["white_flux"], float)
    we = np.asarray(lc["white_error"], float)
    flux = np.asarray(lc["flux"], float)
    err = np.asarray(lc["error"], float)
    white = grid.fits[grid.white_owner[which[0]]][0]
    nan = np.full(t.size, np.nan)
    det = Table()
    det["exposure"] = lc["exposure"]
    det["time_bjd_tdb"] = t
    if "exposure_time" in lc.colnames:
        det["exposure_time"] = np.asarray(lc["exposure_time"], float)
    det["used"] = ~np.asarray(white.fit_mask, bool) if white is not None else np.zeros(t.size, bool)
    w_star = star_alone(white, kind) if white is not None else nan
    with np.errstate(divide="ignore", invalid="ignore"):
        det["white_detrended"] = wf / w_star
        det["white_detrended_error"] = we / np.abs(w_star)
        det["white_systematics"] = w_star
        det["white_model"] = white.model if white is not None else nan
        det["white_residual"] = (wf - det["white_model"]) / w_star
        cols = {k: np.full((t.size, n_ch), np.nan)
                for k in ("detrended", "detrended_error", "systematics", "model", "residual")}
        for j in range(n_ch):
            fit = grid.fits[which[1 + j]][1 + j] if which[1 + j] >= 0 else None
            if fit is None:
                continue
            star = star_alone(fit, kind)
            cols["detrended"][:, j] = flux[:, j] / star
            cols["detrended_error"][:, j] = err[:, j] / np.abs(star)
            cols["systematics"][:, j] = star
            cols["model"][:, j] = fit.model
            cols["residual"][:, j] = (flux[:, j] - fit.model) / star
    for name, values in cols.items():
        det[name] = values
    describe(det, DETRENDED_COLUMNS)
    return det


def _depths_table(lc, channels, grid, event):
    """DEPTHS: the marginalised depth of every light curve and its top model's quality."""
    rows = []
    bands = [(-1, float(lc.meta.get("WLO", channels["wave_lo"][0])),
              float(lc.meta.get("WHI", channels["wave_hi"][-1])))]
    bands += [(j, float(channels["wave_lo"][j]), float(channels["wave_hi"][j]))
              for j in range(len(channels))]
    for c, (j, lo, hi) in enumerate(bands):
        m = int(grid.best[c])
        if m < 0:                           # not fitted
            rows.append({**_unfitted_row(j, lo, hi), **_limb_darkening(grid, event, j)})
            continue
        fit = grid.fits[m][c]
        q = residual_quality(fit.residuals, fit.detrended_error, ~np.asarray(fit.fit_mask, bool),
                             fit.n_params)
        rows.append({"channel": j, "wave_lo": lo, "wave_hi": hi, "wave_mid": 0.5 * (lo + hi),
                     "depth": float(grid.value[c]), "depth_error": float(grid.value_error[c]),
                     "error_models": float(grid.between[c]),
                     "best_model": grid.specs[m].name, "best_weight": float(grid.weight[m, c]),
                     "depth_best": float(grid.depth[m, c]),
                     "error_covariance": float(grid.error_covariance[m, c]),
                     "error_beta": float(grid.error_beta[m, c]),
                     "error_permutation": float(grid.error_permutation[m, c]),
                     "error_inherited": float(grid.error_inherited[m, c]),
                     "rms_ppm": q.rms * 1e6,
                     "rms_dof_ppm": q.rms_dof * 1e6,
                     "expected_ppm": q.expected * 1e6,
                     "rms_over_expected": q.rms / q.expected if q.expected else np.nan,
                     "beta": q.beta, "reduced_chi2": fit.reduced_chi2, "bic": fit.bic,
                     "n_params": fit.n_params, "n_used": q.n_used,
                     "tau_min": fit.tau * 1440 if fit.tau is not None and np.isfinite(fit.tau)
                     else np.nan,
                     # the shapes come from the model's white fit, which channels share
                     "shape_at_edge": ", ".join(
                         grid.white_fits[grid.white_owner[m]].result.shapes_at_edge),
                     **_limb_darkening(grid, event, j)})
    depths = Table(rows=rows, names=list(rows[0]))
    describe(depths, DEPTHS_COLUMNS)
    depths.meta["depth_meaning"] = "(rp/rs)^2" if event["kind"] == "transit" else "fp/(1+fp)"
    depths.meta["depth_error"] = (f"marginalised over {len(grid.specs)} models with "
                                  f"{grid.criterion.upper()} weights; each model's error: "
                                  f"{grid.error_kind}")
    return depths


def _limb_darkening(grid, event, j):
    """The quadratic limb darkening the fit of band ``j`` used (-1: the white light's)."""
    if j < 0 or grid.limb_darkening is None:
        return {"ld_u1": float(event["u1"]), "ld_u2": float(event["u2"])}
    u1, u2 = grid.limb_darkening
    return {"ld_u1": float(np.asarray(u1)[j]), "ld_u2": float(np.asarray(u2)[j])}


def _unfitted_row(j, lo, hi):
    nan = float("nan")
    row = {"channel": j, "wave_lo": lo, "wave_hi": hi, "wave_mid": 0.5 * (lo + hi)}
    for name in ("depth", "depth_error", "error_models"):
        row[name] = nan
    row.update(best_model="", best_weight=nan)
    for name in ("depth_best", "error_covariance", "error_beta", "error_permutation",
                 "error_inherited", "rms_ppm",
                 "rms_dof_ppm", "expected_ppm", "rms_over_expected", "beta", "reduced_chi2", "bic"):
        row[name] = nan
    row.update(n_params=0, n_used=0, tau_min=nan, shape_at_edge="")
    return row


def grid_table(grid, channels):
    """GRID: one row per model and light curve (channel -1 = white light)."""
    rows = []
    n_curves = grid.weight.shape[1]
    for c in range(n_curves):
        ranks = np.empty(len(grid.specs), int)
        ranks[np.argsort(-grid.weight[:, c], kind="stable")] = np.arange(1, len(grid.specs) + 1)
        for m, spec in enumerate(grid.specs):
            if c == 0 and grid.white_owner[m] != m:
                continue          # the same white fit as an earlier model
            white = grid.white_fits[grid.white_owner[m]]
            fit = grid.fits[m][c]
            shapes = "" if white is None else ", ".join(
                f"{k}={v:.6g}" for k, v in sorted(white.shapes.items()))
            ev = white.event if white is not None else {}
            err = white.event_errors if white is not None else {}
            rows.append({
                "model": spec.name if c else spec.white_name, "model_index": m,
                "channel": c - 1, "rank": int(ranks[m]),
                "n_params": int(grid.n_params[m, c]), "n_points": int(grid.n_points[m, c]),
                "chi2": float(grid.chi2[m, c]), "bic": float(grid.bic[m, c]),
                "aic": float(grid.aic[m, c]), "weight": float(grid.weight[m, c]),
                "depth": float(grid.depth[m, c]), "depth_error": float(grid.error[m, c]),
                "error_covariance": float(grid.error_covariance[m, c]),
                "error_beta": float(grid.error_beta[m, c]), "beta": float(grid.beta[m, c]),
                "error_permutation": float(grid.error_permutation[m, c]),
                "error_inherited": float(grid.error_inherited[m, c]),
                "shapes": shapes,
                "t0": float(ev.get("t0", np.nan)), "t0_error": float(err.get("t0", np.nan)),
                "a_rs": float(ev.get("a_rs", np.nan)), "a_rs_error": float(err.get("a_rs", np.nan)),
                "inclination": float(ev.get("inclination", np.nan)),
                "inclination_error": float(err.get("inclination", np.nan)),
                "status": "ok" if fit is not None else "failed"})
    table = Table(rows=rows, names=list(rows[0]))
    describe(table, GRID_COLUMNS)
    table.meta["criterion"] = grid.criterion
    table.meta["depth_error"] = grid.error_kind
    table.meta["failures"] = list(grid.failures)
    return table
