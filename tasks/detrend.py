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

from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.grid import fit_grid
from lightledger.pipeline.plausibility import assess_fits
from lightledger.pipeline.whitelight import event_template as _event_template

from .base import ENTRY_NAME, VisitTask
from .applicability import not_applying, visit_facts
from .detrendmeta import DEPTHS_COLUMNS, coefficients_table, describe, event_cards, fitted_event
# what the fits take, and the product's tables (re-exported: import them from here or there)
from .detrendsetup import (SINGLE_MODEL, _left_out, _median_rate, _wants_phase_curve,  # noqa: F401
                           channel_exclusions, event_template, grid_setup, left_out_rows,
                           phase_grid_models, systematics_setup)
from .detrendtables import (REASONS, _depths_table, _detrended_table,  # noqa: F401
                            _limb_darkening, _unfitted_row, grid_table, read_depths, star_alone,
                            with_reasons)
from .alongside import alongside
from .fitpool import fit_map
from .heap import give_back
from .lightcurves import read_lightcurves, usable_rows, wide_table
from .metadata import channel_text, ecsv_meta, fits_cards, set_time_keywords
from .products import table_hdu, write_ecsv, write_fits, write_fits_stream

__all__ = ["Detrend", "event_template", "grid_setup", "systematics_setup", "star_alone",
           "channel_exclusions", "read_depths", "SINGLE_MODEL", "with_reasons", "left_out_rows"]



def _only_top_residuals(grid):
    """The grid with each channel's other models' fits kept without their residual curves.

    ``grid-models.fits`` needs every model's model and systematics curves and fit
    mask; the residuals, detrended flux and its error (three of a fit's five
    per-exposure curves) are read only for each light curve's top model (its
    DEPTHS row).  The white light's fits are left whole (the white fits hold them).
    """
    fits = []
    for m, row in enumerate(grid.fits):
        fits.append(tuple(fit if fit is None or c == 0 or m == grid.best[c] else
                          dataclasses.replace(fit, detrended_flux=None, detrended_error=None,
                                              residuals=None)
                          for c, fit in enumerate(row)))
    return dataclasses.replace(grid, fits=tuple(fits))

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
        give_back()                     # what the stages before let go of
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
        with fit_map(len(specs)) as mapper:      # --workers N: up to N models fitted at once
            grid = fit_grid(specs, curves, visit.event,
                            progress=lambda done, total, text: self.progress(done, total, text),
                            map=mapper, **options)
        grid = _only_top_residuals(grid)
        n_ch = len(channels)
        kind = visit.event["kind"]
        left_out = left_out_rows(lc, params)
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
        # --workers N: the largest figure is drawn in a forked process while the products are
        # written (tasks/alongside.py); with one worker, at side.wait()
        side = alongside()
        side.start(detrend_channels_figure, fig_channels, t, c_flux, c_err, c_model, c_star, c_used,
                   [channel_text(channels, j) for j in range(n_ch)], dim=dim, event_lines=lines)
        models_path = folder / "grid-models.fits"

        def model_hdus():
            # one model's table in memory at a time
            for m, spec in enumerate(specs):
                hdu = table_hdu(with_reasons(_detrended_table(lc, grid, np.full(n_ch + 1, m), kind),
                                             lc, lc_all, left_out), f"MODEL_{m:02d}")
                hdu.header["MODEL"] = (spec.name, "systematics model")
                yield hdu

        write_fits_stream(models_path, model_hdus(), prov)
        # what follows needs each light curve's top fit alone: the other models' curves go
        grid = dataclasses.replace(
            grid, fits=tuple(tuple(fit if m == grid.best[c] else None for c, fit in enumerate(row))
                             for m, row in enumerate(grid.fits)),
            white_fits=tuple(wf if m == grid.white_owner[grid.best[0]] else None
                             for m, wf in enumerate(grid.white_fits)))
        give_back()
        det = with_reasons(_detrended_table(lc, grid, grid.best, kind), lc, lc_all, left_out)
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
        outputs = [fits_path, models_path]
        meta = ecsv_meta(visit, t, texp if np.any(np.isfinite(texp)) else [0.0], channels)
        meta["time_columns"] = {"time_bjd_tdb": meta["time_columns"]["time_bjd_tdb"]}
        meta["fitted_event"] = event_fit
        meta["channel_limb_darkening"] = params["limb_darkening"]
        for name, tab in (("detrended.ecsv", None), ("depths.ecsv", depths),
                          ("grid.ecsv", table), ("coefficients.ecsv", coefs)):
            # the wide table (one column per channel) made only while it is written
            tab = (wide_table(det, n_ch, channels) if tab is None else tab).copy(copy_data=False)
            depth_meta = {k: tab.meta[k] for k in ("depth_meaning", "depth_error") if k in tab.meta}
            tab.meta.update(meta)
            tab.meta.update(depth_meta)
            write_ecsv(folder / name, tab, prov)
            outputs.append(folder / name)
        del tab
        give_back()                     # the other models' curves, before the figures' canvases
        detrend_figure(fig, t, curves.white_flux, np.sqrt(curves.white_variance), wb.model,
                       star_alone(wb, kind), used, np.asarray(depths["wave_mid"][1:]),
                       depths["depth"][1:], depths["depth_error"][1:], visit.event["kind"],
                       lit=~dim, event_line=line(wb),
                       label=f"white band {depths['wave_lo'][0]:.3f}-{depths['wave_hi'][0]:.3f} um")
        fig2 = folder / "grid.png"
        grid_figure(fig2, [s.name for s in specs], grid.weight, grid.depth, grid.error,
                    np.asarray(depths["wave_mid"][1:]), grid.value, grid.value_error,
                    visit.event["kind"], criterion=grid.criterion)
        side.wait()
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
            names=[visit.name], grid=grid, target=visit.target, event=visit.event)
        metrics["exposures fitted"] = int(np.sum(~top.white.visits[0].fit_mask))
        self.progress(total, total, "model grid")
        used = lc[usable_rows(lc)]
        facts = visit_facts(scanning=not bool(np.all(np.asarray(used["scan_direction"]) == 0)),
                            n_orbits=len(np.unique(np.asarray(used["orbit"]))),
                            kind="phase-curve", phase_curve=None)
        self.write_entry(self.output().path, [lc_path], outputs, metrics, figs, started,
                         warnings=warnings, not_applying=not_applying("detrend", params, facts))
