"""Detrend stage: channel and white light curves divided by a fitted systematics model.

The systematics model (visit-long polynomial, orbit-phase polynomial,
per-orbit exponential ramp, scan-direction offset, optional phase curve) is
fitted with the event's depth, whose shape comes from the visit's a priori
ephemeris (Mandel & Agol 2002 transit with quadratic limb darkening, or a
uniform-disk eclipse).  For an eclipse fitted jointly, the phase curve is the
planet's own flux, hidden by the eclipse (``tie_phase_curve`` of
:func:`lightledger.pipeline.detrend.detrend_light_curve`), so that the depth
is the planet's flux at mid-eclipse; the ramp time scale's uncertainty is
carried into the depth error.

Products in ``NOTEBOOK/detrend-IDENT/``:

``detrended.fits``
    DETRENDED (one row per exposure: time, whether it entered the fit, the
    white and channel light curves divided by their systematics, errors,
    systematics and full models, residuals) and DEPTHS (per channel and the
    white band, as row ``channel = -1``: depth, error, residual rms, the
    expected rms from the errors, their ratio, the time-averaging beta
    factor, reduced chi-square, BIC; ``fitted`` False for a channel left
    out, with its ``note``; ``unphysical`` for a depth negative beyond three
    errors or hiding the whole flux, ``noisy`` for residuals above five
    times the expected rms, each also a warning in the entry and on the
    console);
``detrended.ecsv``, ``depths.ecsv``
    the same as ECSV;
``detrend.png``
    the white light curve before and after, with the model, and the depth
    spectrum.
"""

import dataclasses
import time
from functools import partial

import luigi
import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.detrend import (fit_at_fitted_radius, fit_channels, fit_light_curve,
                                          tied_phase_curve)
from lightledger.pipeline.diagnostics import residual_quality
from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.plausibility import assess_fits
from lightledger.pipeline.systematics import SystematicsInputs, standard_model
from lightledger.pipeline.transit import eclipse_flux, transit_flux

from .base import ENTRY_NAME, VisitTask
from .lightcurves import read_lightcurves, wide_table
from .products import table_hdu, write_ecsv, write_fits

__all__ = ["Detrend", "event_template", "read_depths"]


def event_template(bjd, event):
    """Unit event shape from the a priori ephemeris, and what one unit of depth means.

    Transit: ``s = (1 - model) / rp_rs**2`` so that the fitted depth is the
    (rp/rs)^2 of a uniform-disk-equivalent transit. Eclipse: ``s`` is the
    hidden fraction of the planet (0 out of eclipse, 1 in full eclipse), so
    the fitted depth is fp / (1 + fp).
    """
    shape = dict(t0=event["t0"], period=event["period"], rp_rs=event["rp_rs"],
                 a_rs=event["a_rs"], inclination=event["inclination"])
    if event["kind"] == "transit":
        model = transit_flux(bjd, u1=event["u1"], u2=event["u2"], **shape)
        return (1.0 - model) / event["rp_rs"] ** 2
    visible = eclipse_flux(bjd, fp_fs=1.0, **shape) - 1.0
    return 1.0 - visible


def _wants_phase_curve(setting, event, bjd):
    if setting == "auto":
        return event["kind"] == "eclipse" and np.ptp(bjd) > 0.1 * event["period"]
    return setting == "on"


def systematics_setup(lc, event, params):
    """The visit's systematics inputs and model, the fit options and the exposures left out.

    Maps the detrend stage's parameters onto a
    :class:`~lightledger.pipeline.systematics.SystematicsModel`: a stare has no
    orbit-phase polynomial, scan offset or dropped first orbit; an eclipse
    fitted jointly with its phase curve hides the planet's flux (the
    ``planet`` phase-curve model).
    """
    t = np.asarray(lc["time_bjd_tdb"], float)
    orbit = np.asarray(lc["orbit"], int)
    stare = bool(np.all(np.asarray(lc["scan_direction"]) == 0))
    scan = not stare and params["scan_offset"]
    inputs = SystematicsInputs(t, orbit=orbit, orbit_time=np.asarray(lc["orbit_time"], float),
                               scan_direction=np.asarray(lc["scan_direction"], int) if scan else None)
    joint = params["fit"] == "joint"
    phase = (event["t0"], event["period"]) if _wants_phase_curve(params["phase_curve"], event, t) \
        and event["kind"] != "phase-curve" else None   # a phase-curve event models the planet itself
    # An eclipse hides the planet's flux at its phase: fit that flux as the phase
    # curve itself (joint fits only; pipeline/eventfit.py, planet_basis).
    tie = (phase is not None and event["kind"] == "eclipse" and joint
           and params["phase_curve_model"] == "planet")
    model = standard_model(visit_order=params["visit_order"],
                           orbit_order=max(params["orbit_order"], 0) if not stare else 0,
                           scan_offset=scan, phase_sinusoids=None if tie else phase,
                           ramp=params["orbit_ramp"])
    options = dict(mode="joint" if joint else "out_of_event")
    if tie:
        options.update(tied_phase_curve(t, *phase))
    drop = params["drop_first_orbit"] and not stare and len(np.unique(orbit)) > 2
    left_out = orbit == np.min(orbit) if drop else np.zeros(t.size, bool)
    return inputs, model, options, left_out


def channel_exclusions(visit, n_channels):
    """{channel: note} of the channels the visit description excludes (``[exclude] channels``)."""
    notes = {}
    for first, last, reason in (getattr(visit, "exclude", None) or {}).get("channels", ()):
        for j in range(first, min(last, n_channels - 1) + 1):
            notes[j] = ("not fitted: excluded by the visit description (exclude.channels)"
                        + (f": {reason}" if reason else ""))
    return notes


def white_like_unfitted(result):
    """A fit result of the white light curve's shape holding NaN: a channel not fitted."""
    values = {}
    for f in dataclasses.fields(result):
        v = getattr(result, f.name)
        if isinstance(v, np.ndarray) and v.dtype.kind == "f":
            values[f.name] = np.full_like(v, np.nan)
        elif isinstance(v, np.ndarray) and v.dtype.kind == "b":
            values[f.name] = np.ones_like(v)
        elif isinstance(v, float):
            values[f.name] = float("nan")
    return dataclasses.replace(result, **values)


def fit_unless_masked(fit, unfitted, flux, variance, template, *, mask):
    """``fit(...)``, or ``unfitted`` for a light curve whose every exposure is masked."""
    if np.all(mask):
        return unfitted
    return fit(flux, variance, template, mask=mask)


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
        lc, channels = read_lightcurves(lc_path)
        if visit.event["kind"] == "phase-curve":
            return self._run_phase_curve(started, lc_path, lc, channels)
        t = np.asarray(lc["time_bjd_tdb"], float)
        template = event_template(t, visit.event)
        if not np.any(template > 0):
            raise LightledgerError(f"{visit.path}: the {visit.event['kind']} of the ephemeris "
                                   f"(event.t0, event.period) falls outside the visit's exposures")
        inputs, model, options, left_out = systematics_setup(lc, visit.event, params)
        fit = partial(fit_light_curve, inputs, model=model, **options)
        if visit.event["kind"] == "transit":
            # the transit's shape follows the fitted radius ratio, not the a priori one
            fit = partial(fit_at_fitted_radius, fit,
                          lambda rp: event_template(t, dict(visit.event, rp_rs=rp)))
        self.progress(0, 2, "white light curve")
        bad = np.asarray(lc["flux_outlier"], bool)
        wf = np.asarray(lc["white_flux"], float)
        we = np.asarray(lc["white_error"], float)
        white = fit(wf, we ** 2, template, mask=bad | left_out | np.asarray(lc["white_mask"], bool))
        self.progress(1, 2, "channel light curves")
        flux = np.asarray(lc["flux"], float)
        err = np.asarray(lc["error"], float)
        mask = np.asarray(lc["mask"], bool) | (bad | left_out)[:, None]
        notes = channel_exclusions(visit, len(channels))
        for j in notes:                     # the observer's excluded channels are not fitted
            mask[:, j] = True
        unfitted = white_like_unfitted(white)
        chans = fit_channels(t, flux, err ** 2, template, mask=mask,
                             divide_white=white.systematics if params["common_mode"] else None,
                             fit=partial(fit_unless_masked, fit, unfitted))
        for j in range(len(channels)):
            if j not in notes and np.all(mask[:, j]):
                notes[j] = "not fitted: every exposure of the channel is masked"
        used = ~np.asarray(white.fit_mask, bool)   # fit_mask is True where left out
        # Detrended light curves keep the whole astrophysical signal: divided by the
        # systematics alone and normalised to the star alone.
        kind = visit.event["kind"]
        w_star = star_alone(white, kind)
        c_star = np.stack([star_alone(f, kind) for f in chans.fits], axis=1) \
            * chans.white_shape[:, None]

        det = Table()
        det["exposure"] = lc["exposure"]
        det["time_bjd_tdb"] = t
        det["time_bjd_tdb"].unit = "d"
        det["used"] = used
        det["white_detrended"] = wf / w_star
        det["white_detrended_error"] = we / np.abs(w_star)
        det["white_systematics"] = w_star
        det["white_model"] = white.model
        det["white_residual"] = (wf - white.model) / w_star
        det["detrended"] = flux / c_star
        det["detrended_error"] = err / np.abs(c_star)
        det["systematics"] = c_star
        det["model"] = chans.model
        det["residual"] = (flux - chans.model) / c_star
        for name in ("white_systematics", "white_model", "systematics", "model"):
            det[name].unit = "electron"

        rows = []
        fluxes = [(-1, float(lc.meta.get("WLO", channels["wave_lo"][0])),
                   float(lc.meta.get("WHI", channels["wave_hi"][-1])), white,
                   wf, we)]
        for j in range(len(channels)):
            fluxes.append((j, float(channels["wave_lo"][j]), float(channels["wave_hi"][j]),
                           chans.fits[j], flux[:, j], err[:, j]))
        for j, lo, hi, fit_j, f, e in fluxes:
            q = residual_quality(fit_j.residuals, fit_j.detrended_error,
                                 ~np.asarray(fit_j.fit_mask, bool), fit_j.n_params)
            rows.append({"channel": j, "wave_lo": lo, "wave_hi": hi, "wave_mid": 0.5 * (lo + hi),
                         "depth": fit_j.depth, "depth_error": fit_j.depth_error,
                         "rms_ppm": q.rms * 1e6,
                         "rms_dof_ppm": q.rms * 1e6 * np.sqrt(q.n_used / max(q.n_used - fit_j.n_params, 1)),
                         "expected_ppm": q.expected * 1e6,
                         "rms_over_expected": q.rms / q.expected if q.expected else np.nan,
                         "beta": q.beta, "reduced_chi2": fit_j.reduced_chi2, "bic": fit_j.bic,
                         "n_params": fit_j.n_params, "n_used": q.n_used, "tau_min": fit_j.tau * 1440
                         if fit_j.tau is not None and np.isfinite(fit_j.tau) else np.nan,
                         "shape_at_edge": ", ".join(getattr(fit_j, "shapes_at_edge", ()))})
        depths = Table(rows=rows, names=list(rows[0]))
        # can the results be trusted? (pipeline/plausibility.py)
        quality = assess_fits(depths["depth"], depths["depth_error"],
                              np.asarray(depths["rms_dof_ppm"], float) * 1e-6,
                              np.asarray(depths["expected_ppm"], float) * 1e-6)
        depths["fitted"] = [int(c) not in notes for c in depths["channel"]]
        depths["unphysical"] = quality.unphysical
        depths["noisy"] = quality.noisy
        depths["note"] = [notes.get(int(c), "") for c in depths["channel"]]
        warnings = []
        for c, reason in zip(depths["channel"], quality.reasons):
            if reason:
                label = "white light curve" if c < 0 else f"channel {int(c)}"
                warnings.append(f"{self.folder / 'detrended.fits'}: {label}: {reason}")
        for c, names in zip(depths["channel"], depths["shape_at_edge"]):
            if names:
                label = "white light curve" if c < 0 else f"channel {int(c)}"
                warnings.append(f"{label}: {names} chosen at the end of the range searched "
                                f"(the grid extended to what the exposures can tell apart): "
                                f"this light curve does not constrain it")
        for name, unit in (("wave_lo", "um"), ("wave_hi", "um"), ("wave_mid", "um"),
                           ("tau_min", "min")):
            depths[name].unit = unit
        depths.meta["event"] = visit.event["kind"]
        depths.meta["depth_meaning"] = ("(rp/rs)^2" if visit.event["kind"] == "transit"
                                        else "fp/(1+fp)")

        prov = self.provenance([lc_path])
        folder = self.folder
        fits_path = folder / "detrended.fits"
        hdus = [table_hdu(det, "DETRENDED"), table_hdu(depths, "DEPTHS")]
        hdus[1].header["EVENT"] = (visit.event["kind"], "event whose depth was fitted")
        hdus[1].header["DEPTHIS"] = (depths.meta["depth_meaning"], "meaning of the depth column")
        hdus[1].header["NUNPHYS"] = (int(np.sum(depths["unphysical"])),
                                     "curves with an unphysical depth")
        hdus[1].header["NNOISY"] = (int(np.sum(depths["noisy"])),
                                    "curves with residual rms above 5x expected")
        write_fits(fits_path, hdus, prov)
        outputs = [fits_path]
        for name, table in (("detrended.ecsv", wide_table(det, len(channels))), ("depths.ecsv", depths)):
            write_ecsv(folder / name, table, prov)
            outputs.append(folder / name)
        from .figures import detrend_figure
        fig = folder / "detrend.png"
        detrend_figure(fig, t, wf, we, white.model, white.systematics, used,
                       np.asarray(depths["wave_mid"][1:]), depths["depth"][1:],
                       depths["depth_error"][1:], visit.event["kind"])
        w = depths[0]
        metrics = {"white depth (ppm)": round(float(w["depth"]) * 1e6, 1),
                   "white depth error (ppm)": round(float(w["depth_error"]) * 1e6, 1),
                   "white rms (ppm)": round(float(w["rms_ppm"]), 1),
                   "white rms per degree of freedom (ppm)": round(float(w["rms_dof_ppm"]), 1),
                   "white rms / expected": round(float(w["rms_over_expected"]), 3),
                   "white beta": round(float(w["beta"]), 3) if np.isfinite(w["beta"]) else None,
                   "median channel rms / expected":
                       round(float(np.nanmedian(depths["rms_over_expected"][1:])), 3),
                   "exposures fitted": int(used.sum()),
                   **({"channels not fitted": {str(j): note for j, note in sorted(notes.items())}}
                      if notes else {})}
        self.progress(2, 2, "light curves fitted")
        self.write_entry(self.output().path, [lc_path], outputs, metrics, [fig], started,
                         warnings=warnings)

    def _run_phase_curve(self, started, lc_path, lc, channels):
        """A visit with every transit and eclipse and the planet's flux over the orbit."""
        from lightledger.pipeline.programme import fit_programme

        from .phasecurve import planet_model, visit_curves, write_phase_products

        visit, params = self.config, self.params
        planet = planet_model(visit.event, params)
        curves = visit_curves(lc, visit.event, params, visit.name)
        fit = fit_programme([curves], planet, progress=lambda done, total: self.progress(
            done, total + 1, "white and channel light curves"))
        band = (float(lc.meta.get("WLO", channels["wave_lo"][0])),
                float(lc.meta.get("WHI", channels["wave_hi"][-1])))
        outputs, figs, metrics = write_phase_products(
            self.folder, self.provenance([lc_path]), fit, [lc], channels, band, planet, params,
            names=[visit.name])
        metrics["exposures fitted"] = int(np.sum(~fit.white.visits[0].fit_mask))
        self.progress(len(channels) + 2, len(channels) + 2, "white and channel light curves")
        self.write_entry(self.output().path, [lc_path], outputs, metrics, figs, started)

