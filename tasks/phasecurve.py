"""Phase-curve products: the full-orbit fit of one visit or of a programme of visits.

Shared by the detrend stage of a ``phase-curve`` visit and by the programme's
``joint`` stage: both fit :func:`lightledger.pipeline.programme.fit_programme`
and write the same products into their folder.

``detrended.fits`` (one visit) or ``detrended-N.fits`` (visit N of a programme)
    DETRENDED: per exposure, the white and channel flux divided by the
    systematics alone (the star alone = 1: transits, eclipses and the phase
    variation stay in), errors, systematics, models, residuals;
``planet.fits``
    PLANET (per channel and the white band as ``channel = -1``: radius ratio,
    transit and eclipse depths, night side, extremes, amplitude, hotspot
    offset, fit quality), DAYNIGHT (day-side and night-side spectra),
    PHASEBINS (phase-resolved spectrum), PHASE_WHITE and PHASE_NN (per
    exposure: time, orbital phase, the planet's flux over the star's, error,
    model); a programme adds ALONE (each visit fitted by itself beside the
    joint fit) and CONSISTENCY (their chi-square);
ECSV copies of every table, and the figures ``phasecurve.png``,
``phasecurve-channels.png``, ``phasespectra.png`` and ``residuals.png``.

Column meanings are declared once below (``*_COLUMNS``) and documented in the
README.
"""

import numpy as np
from astropy.table import Table

from lightledger.pipeline.diagnostics import residual_quality
from lightledger.pipeline.jointfit import PlanetModel
from lightledger.pipeline.orbit import Ephemeris
from lightledger.pipeline.programme import (QUANTITIES, VisitCurves, consistency,
                                            phase_resolved_spectrum, planet_flux_points, quantity)

from .products import table_hdu, write_ecsv, write_fits

__all__ = ["planet_model", "visit_curves", "write_phase_products", "phase_grid_table",
           "DETRENDED_COLUMNS", "PLANET_COLUMNS", "PLANET_GRID_COLUMNS", "PHASE_GRID_COLUMNS", "PHASE_COLUMNS", "BIN_COLUMNS", "DAYNIGHT_COLUMNS", "ALONE_COLUMNS",
           "CONSISTENCY_COLUMNS"]

#: DETRENDED of a phase-curve fit (per exposure).
DETRENDED_COLUMNS = {
    "exposure": ("", "exposure number in start-time order"),
    "time_bjd_tdb": ("d", "mid-exposure time, BJD_TDB"),
    "phase": ("", "orbital phase, cycles from mid-transit, in [0, 1)"),
    "used": ("", "True where the exposure entered the fit"),
    "white_detrended": ("", "white flux over the systematics model alone; the star alone = 1"),
    "white_detrended_error": ("", "1-sigma error of white_detrended"),
    "white_systematics": ("electron", "star's flux times the systematics (white band)"),
    "white_model": ("electron", "full model of the white flux"),
    "white_residual": ("", "white_detrended minus the astrophysical model"),
    "detrended": ("", "channel flux over its systematics model alone; the star alone = 1"),
    "detrended_error": ("", "1-sigma error of detrended"),
    "systematics": ("electron", "star's flux times the systematics (channel)"),
    "model": ("electron", "full model of the channel flux"),
    "residual": ("", "detrended minus the astrophysical model"),
    "set_aside": ("", "True: exposure set aside at input (values NaN)"),
    "reason": ("", "why the exposure is not used; empty when used"),
}

#: PLANET: one row per channel and the white band (channel -1).
PLANET_COLUMNS = {
    "channel": ("", "channel number; -1 = the white band"),
    "wave_lo": ("um", "channel lower edge"),
    "wave_hi": ("um", "channel upper edge"),
    "wave_mid": ("um", "channel centre"),
    "rp_rs": ("", "planet-to-star radius ratio (fitted through the limb-darkened transit, "
                  "else the a priori value)"),
    "rp_rs_error": ("", "1-sigma error of rp_rs (NaN when not fitted)"),
    "transit_depth": ("", "(rp/rs)^2"),
    "transit_depth_error": ("", "1-sigma error of transit_depth"),
    "eclipse_depth": ("", "planet flux over the star's at mid-eclipse: the day side"),
    "eclipse_depth_error": ("", "1-sigma error of eclipse_depth"),
    "night_flux": ("", "planet flux over the star's at mid-transit: the night side"),
    "night_flux_error": ("", "1-sigma error of night_flux"),
    "max_flux": ("", "largest planet flux over the star's along the orbit"),
    "max_flux_error": ("", "1-sigma error of max_flux"),
    "min_flux": ("", "smallest planet flux over the star's along the orbit"),
    "min_flux_error": ("", "1-sigma error of min_flux"),
    "amplitude": ("", "peak-to-trough planet flux over the star's"),
    "amplitude_error": ("", "1-sigma error of amplitude"),
    "offset_deg": ("deg", "orbital angle by which the maximum precedes mid-eclipse (east > 0)"),
    "offset_error_deg": ("deg", "1-sigma error of offset_deg"),
    "rms_ppm": ("", "rms of the fit's relative residuals, ppm"),
    "rms_dof_ppm": ("", "rms_ppm times sqrt(N / (N - n_params))"),
    "expected_ppm": ("", "rms of the relative errors, ppm"),
    "rms_over_expected": ("", "rms_ppm / expected_ppm"),
    "beta": ("", "time-averaging beta factor of the residuals"),
    "reduced_chi2": ("", "chi-square per degree of freedom"),
    "bic": ("", "Bayesian information criterion"),
    "n_params": ("", "free parameters of the fit"),
    "n_used": ("", "exposures in the fit"),
}

#: PLANET columns added when the phase curve was fitted with a grid of systematics models.
PLANET_GRID_COLUMNS = {
    "best_model": ("", "top-weighted systematics model of this light curve (its fit gives the "
                       "fit-quality columns, DETRENDED and the PHASE tables)"),
    "best_weight": ("", "that model's weight"),
    "n_models": ("", "models fitted to this light curve"),
    "eclipse_depth_models": ("", "part of eclipse_depth_error from the spread between models"),
    "transit_depth_models": ("", "part of transit_depth_error from the spread between models"),
    "amplitude_models": ("", "part of amplitude_error from the spread between models"),
}

#: GRID of a phase curve: one row per systematics model and light curve.
PHASE_GRID_COLUMNS = {
    "model": ("", "systematics model (tokens joined by '+')"),
    "model_index": ("", "position of the model in the grid"),
    "channel": ("", "channel number; -1 = the white band"),
    "rank": ("", "1 = highest weight for this light curve"),
    "n_params": ("", "free parameters of the fit"),
    "n_points": ("", "exposures in the fit"),
    "chi2": ("", "chi-square of the fit"),
    "bic": ("", "chi2 + n_params ln(n_points)"),
    "aic": ("", "chi2 + 2 n_params"),
    "weight": ("", "exp(-criterion/2), normalised over the models of this light curve"),
    **{name: ("deg" if name == "offset_deg" else "", f"{name} of this model's fit")
       for name in ("rp_rs", "transit_depth", "eclipse_depth", "night_flux", "max_flux",
                    "min_flux", "amplitude", "offset_deg")},
    **{("offset_error_deg" if name == "offset_deg" else f"{name}_error"):
       ("deg" if name == "offset_deg" else "", f"1-sigma error of {name} of this model's fit")
       for name in ("rp_rs", "transit_depth", "eclipse_depth", "night_flux", "max_flux",
                    "min_flux", "amplitude", "offset_deg")},
    "status": ("", "ok, or failed (weight 0; grid.ecsv meta 'failures' says why)"),
}

#: PHASE_WHITE and PHASE_NN: the planet's flux per exposure.
PHASE_COLUMNS = {
    "visit": ("", "visit number (0 = first of the programme)"),
    "time_bjd_tdb": ("d", "mid-exposure time, BJD_TDB"),
    "phase": ("", "orbital phase, cycles from mid-transit, in [0, 1)"),
    "planet_flux": ("", "detrended flux minus the star's visible part: the planet's visible "
                        "flux over the star's (0 in full eclipse)"),
    "planet_error": ("", "1-sigma error of planet_flux"),
    "model": ("", "fitted visible planet flux"),
    "visible": ("", "visible fraction of the planet's disk (eclipses)"),
    "blocked": ("", "fraction of the star's flux hidden by the planet (transits)"),
    "used": ("", "True where the exposure entered the fit"),
    "in_event": ("", "True during a transit or an eclipse"),
}

#: PHASEBINS: the phase-resolved spectrum, one row per (bin, channel).
BIN_COLUMNS = {
    "channel": ("", "channel number; -1 = the white band"),
    "wave_mid": ("um", "channel centre"),
    "phase_lo": ("", "bin lower edge, cycles from mid-transit"),
    "phase_hi": ("", "bin upper edge, cycles from mid-transit"),
    "phase_mid": ("", "bin centre"),
    "planet_flux": ("", "weighted mean planet flux over the star's, out of transits and eclipses"),
    "planet_error": ("", "1-sigma error of planet_flux"),
    "model": ("", "fitted planet flux averaged over the same exposures"),
    "count": ("", "exposures averaged"),
}

#: DAYNIGHT: day-side and night-side spectra.
DAYNIGHT_COLUMNS = {
    "channel": ("", "channel number"),
    "wave_lo": ("um", "channel lower edge"),
    "wave_hi": ("um", "channel upper edge"),
    "wave_mid": ("um", "channel centre"),
    "day_flux": ("", "planet flux over the star's at mid-eclipse (day side)"),
    "day_error": ("", "1-sigma error of day_flux"),
    "night_flux": ("", "planet flux over the star's at mid-transit (night side)"),
    "night_error": ("", "1-sigma error of night_flux"),
}

def _err_name(name):
    return "offset_error_deg" if name == "offset_deg" else f"{name}_error"


#: ALONE: every visit fitted by itself, and the joint fit (visit = -1).
ALONE_COLUMNS = {
    "visit": ("", "visit number; -1 = the joint fit"),
    "name": ("", "visit name"),
    "channel": ("", "channel number; -1 = the white band"),
    **{name: ("deg" if name == "offset_deg" else "", text) for name, text in QUANTITIES},
    **{_err_name(name): ("deg" if name == "offset_deg" else "", f"1-sigma error of {name}")
       for name, _ in QUANTITIES},
}

#: CONSISTENCY: chi-square of the single-visit values about the joint one.
CONSISTENCY_COLUMNS = {
    "channel": ("", "channel number; -1 = the white band"),
    "quantity": ("", "which quantity (a column of ALONE)"),
    "chi2": ("", "sum over visits of ((alone - joint) / alone error)^2"),
    "n_visits": ("", "visits that measured the quantity"),
}


def _describe(table, columns):
    for name, (unit, text) in columns.items():
        if name in table.colnames:
            table[name].unit = unit or None
            table[name].description = text
    return table


def planet_model(event, params):
    """The shared planet of a visit's ``[event]`` (or a programme's ``[planet]``)."""
    eph = Ephemeris(event["t0"], event["period"], event["a_rs"], event["inclination"],
                    event.get("eccentricity", 0.0) or 0.0, event.get("omega", 90.0)
                    if event.get("omega") is not None else 90.0)
    return PlanetModel(eph, float(event["rp_rs"]), float(event.get("u1") or 0.0),
                       float(event.get("u2") or 0.0), harmonics=int(params["harmonics"]),
                       fit_radius=bool(params["fit_radius"]))


def visit_curves(lc, event, detrend_params, name):
    """A visit's light curves and systematics model from its LIGHTCURVES table.

    Exposures set aside at input (rows of LIGHTCURVES with ``set_aside``) are
    not among the curves.
    """
    from .detrend import systematics_setup
    from .lightcurves import usable_rows

    lc = lc[usable_rows(lc)]
    inputs, model, _, left_out = systematics_setup(lc, event, detrend_params)
    bad = np.asarray(lc["flux_outlier"], bool) | left_out
    return VisitCurves(
        inputs=inputs, model=model, white_flux=np.asarray(lc["white_flux"], float),
        white_variance=np.asarray(lc["white_error"], float) ** 2,
        white_mask=bad | np.asarray(lc["white_mask"], bool),
        flux=np.asarray(lc["flux"], float), variance=np.asarray(lc["error"], float) ** 2,
        mask=np.asarray(lc["mask"], bool) | bad[:, None], name=name)


def _detrended_table(lc, k, fit, phase):
    white = fit.white.visits[k]
    chans = [c.visits[k] for c in fit.channels]

    def stack(attr):
        return np.stack([getattr(c, attr) for c in chans], axis=1)

    det = Table()
    det["exposure"] = np.asarray(lc["exposure"], int)
    det["time_bjd_tdb"] = np.asarray(lc["time_bjd_tdb"], float)
    det["phase"] = phase
    det["used"] = ~white.fit_mask
    det["white_detrended"] = white.detrended
    det["white_detrended_error"] = white.detrended_error
    det["white_systematics"] = white.systematics
    det["white_model"] = white.model
    det["white_residual"] = white.residuals
    det["detrended"] = stack("detrended")
    det["detrended_error"] = stack("detrended_error")
    det["systematics"] = stack("systematics")
    det["model"] = stack("model")
    det["residual"] = stack("residuals")
    return _describe(det, DETRENDED_COLUMNS)


def _planet_row(j, lo, hi, jf):
    res = np.concatenate([v.residuals for v in jf.visits])
    err = np.concatenate([v.detrended_error for v in jf.visits])
    used = np.concatenate([~v.fit_mask for v in jf.visits])
    q = residual_quality(res, err, used, jf.n_params)
    s = jf.summary
    nan = float("nan")

    def pick(attr):
        return getattr(s, attr) if s is not None else nan

    return {"channel": j, "wave_lo": lo, "wave_hi": hi, "wave_mid": 0.5 * (lo + hi),
            "rp_rs": jf.rp_rs, "rp_rs_error": jf.rp_rs_error,
            "transit_depth": jf.transit_depth, "transit_depth_error": jf.transit_depth_error,
            "eclipse_depth": pick("day"), "eclipse_depth_error": pick("day_error"),
            "night_flux": pick("night"), "night_flux_error": pick("night_error"),
            "max_flux": pick("maximum"), "max_flux_error": pick("maximum_error"),
            "min_flux": pick("minimum"), "min_flux_error": pick("minimum_error"),
            "amplitude": pick("amplitude"), "amplitude_error": pick("amplitude_error"),
            "offset_deg": pick("offset_deg"), "offset_error_deg": pick("offset_error_deg"),
            "rms_ppm": q.rms * 1e6, "rms_dof_ppm": q.rms_dof * 1e6,
            "expected_ppm": q.expected * 1e6,
            "rms_over_expected": q.rms / q.expected if q.expected else nan, "beta": q.beta,
            "reduced_chi2": jf.reduced_chi2, "bic": jf.bic, "n_params": jf.n_params,
            "n_used": q.n_used}


def _with_grid(row, grid, c):
    """A PLANET row with every planet quantity marginalised over the grid (light curve ``c``)."""
    from lightledger.pipeline.phasegrid import PLANET_QUANTITIES
    out = dict(row)
    for name in PLANET_QUANTITIES:
        out[name] = float(grid.value[name][c])
        out[_err_name(name)] = float(grid.error[name][c])
    m = int(grid.best[c])
    out["best_model"] = grid.names[m]
    out["best_weight"] = float(grid.weight[m, c])
    out["n_models"] = int(np.sum(np.isfinite(grid.chi2[:, c])))
    for name in ("eclipse_depth", "transit_depth", "amplitude"):
        out[f"{name}_models"] = float(grid.between[name][c])
    return out


def phase_grid_table(grid):
    """GRID of a phase-curve fit: one row per model and light curve (channel -1 = white band)."""
    from lightledger.pipeline.phasegrid import PLANET_QUANTITIES
    rows = []
    n_models, n_curves = grid.weight.shape
    for c in range(n_curves):
        ranks = np.empty(n_models, int)
        ranks[np.argsort(-grid.weight[:, c], kind="stable")] = np.arange(1, n_models + 1)
        for m, name in enumerate(grid.names):
            row = {"model": name, "model_index": m, "channel": c - 1, "rank": int(ranks[m]),
                   "n_params": int(grid.n_params[m, c]), "n_points": int(grid.n_points[m, c]),
                   "chi2": float(grid.chi2[m, c]), "bic": float(grid.bic[m, c]),
                   "aic": float(grid.aic[m, c]), "weight": float(grid.weight[m, c])}
            for q in PLANET_QUANTITIES:
                row[q] = float(grid.values[q][m, c])
            for q in PLANET_QUANTITIES:
                row[_err_name(q)] = float(grid.errors[q][m, c])
            row["status"] = "ok" if np.isfinite(grid.chi2[m, c]) else "failed"
            rows.append(row)
    table = _table(rows, PHASE_GRID_COLUMNS)
    table.meta["criterion"] = grid.criterion
    table.meta["failures"] = list(grid.failures)
    return table


def _table(rows, columns):
    return _describe(Table(rows=rows, names=list(rows[0])), columns)


def write_phase_products(folder, prov, fit, lcs, channels, white_band, planet, params, *,
                         names, alone=None, figures=True, grid=None):
    """Write every phase-curve product of a fit into ``folder``.

    Parameters
    ----------
    folder : Path
    prov : Provenance
    fit : ProgrammeFit
    lcs : list of astropy Table
        Each visit's LIGHTCURVES.
    channels : astropy Table
        CHANNELS (wave_lo, wave_hi per channel).
    white_band : (float, float)
        White band edges, um.
    planet : PlanetModel
    params : dict
        ``harmonics``, ``fit_radius``, ``phase_bins``.
    names : list of str
        Visit names.
    alone : list of ProgrammeFit, optional
        Each visit fitted by itself (programmes).
    figures : bool
        Draw the figures.
    grid : PhaseGrid, optional
        The fits of a grid of systematics models
        (:func:`lightledger.pipeline.phasegrid.fit_phase_grid`; ``fit`` is
        then its :meth:`~lightledger.pipeline.phasegrid.PhaseGrid.top_fit`):
        PLANET and DAYNIGHT carry the marginalised quantities, with the
        :data:`PLANET_GRID_COLUMNS`, and a GRID table (``grid.ecsv``) lists
        every model's fit.

    Returns
    -------
    (outputs, figures, metrics)
        Paths written, figure paths, headline figures for the entry.
    """
    from .detrend import with_reasons
    from .lightcurves import usable_rows

    eph = planet.ephemeris
    lcs_all = lcs
    lcs = [lc[usable_rows(lc)] for lc in lcs_all]        # the exposures fitted
    times = [np.asarray(lc["time_bjd_tdb"], float) for lc in lcs]
    outputs = []
    single = len(lcs) == 1
    for k, lc in enumerate(lcs):
        phase = np.mod((times[k] - eph.t0) / eph.period, 1.0)
        det = _detrended_table(lc, k, fit, phase)
        # the first orbit was left out when none of its exposures entered the fit
        first = np.asarray(lc["first_orbit"], bool)
        left_out = first if first.any() and not np.any(det["used"][first]) else np.zeros_like(first)
        det = with_reasons(det, lc, lcs_all[k], left_out)
        if "phase" in det.colnames:       # a set-aside exposure's phase, from its time
            t_all = np.asarray(det["time_bjd_tdb"], float)
            det["phase"] = np.mod((t_all - eph.t0) / eph.period, 1.0)
        stem = "detrended" if single else f"detrended-{k + 1}"
        hdu = table_hdu(det, "DETRENDED")
        hdu.header["VISITNAM"] = (names[k][:60], "visit name")
        hdu.header["NORM"] = ("star alone", "detrended flux: 1 = the star alone")
        write_fits(folder / f"{stem}.fits", [hdu], prov)
        wide = Table()
        for col in det.colnames:
            if det[col].ndim == 2:
                for j in range(det[col].shape[1]):
                    wide[f"{col}_{j:02d}"] = det[col][:, j]
                    wide[f"{col}_{j:02d}"].unit = det[col].unit
            else:
                wide[col] = det[col]
        write_ecsv(folder / f"{stem}.ecsv", wide, prov)
        outputs += [folder / f"{stem}.fits", folder / f"{stem}.ecsv"]

    all_fits = [(-1, white_band[0], white_band[1], fit.white)] + [
        (j, float(channels["wave_lo"][j]), float(channels["wave_hi"][j]), jf)
        for j, jf in enumerate(fit.channels)]
    planet_rows = [_planet_row(j, lo, hi, jf) for j, lo, hi, jf in all_fits]
    if grid is not None:
        planet_rows = [_with_grid(row, grid, c) for c, row in enumerate(planet_rows)]
    planet_tab = _table(planet_rows, {**PLANET_COLUMNS, **PLANET_GRID_COLUMNS})
    daynight = _table([{"channel": row["channel"], "wave_lo": row["wave_lo"],
                        "wave_hi": row["wave_hi"], "wave_mid": row["wave_mid"],
                        "day_flux": row["eclipse_depth"], "day_error": row["eclipse_depth_error"],
                        "night_flux": row["night_flux"], "night_error": row["night_flux_error"]}
                       for row in planet_rows[1:]], DAYNIGHT_COLUMNS)
    points = [planet_flux_points(jf, times, eph.t0, eph.period) for _, _, _, jf in all_fits]
    bins = phase_resolved_spectrum(points, params["phase_bins"])
    bin_rows = []
    for b in range(bins.lo.size):
        for i, (j, lo, hi, _) in enumerate(all_fits):
            bin_rows.append({"channel": j, "wave_mid": 0.5 * (lo + hi), "phase_lo": bins.lo[b],
                             "phase_hi": bins.hi[b], "phase_mid": bins.mid[b],
                             "planet_flux": bins.flux[b, i], "planet_error": bins.error[b, i],
                             "model": bins.model[b, i], "count": int(bins.count[b, i])})
    bin_tab = _table(bin_rows, BIN_COLUMNS)
    phase_tabs = []
    for (j, _, _, _), p in zip(all_fits, points):
        t = Table({"visit": p.visit, "time_bjd_tdb": p.time, "phase": p.phase,
                   "planet_flux": p.planet_flux, "planet_error": p.planet_error,
                   "model": p.model, "visible": p.visible, "blocked": p.blocked,
                   "used": p.used, "in_event": p.in_event})
        phase_tabs.append(("PHASE_WHITE" if j < 0 else f"PHASE_{j:02d}",
                           _describe(t, PHASE_COLUMNS)))
    tables = [("PLANET", planet_tab), ("DAYNIGHT", daynight), ("PHASEBINS", bin_tab)]
    if alone is not None:
        rows, crow = [], []
        for (j, _, _, jf), pick in zip(all_fits, [lambda f: f.white] + [
                (lambda f, jj=jj: f.channels[jj]) for jj in range(len(fit.channels))]):
            fits_alone = [pick(a) for a in alone]
            for v, fa in [(k, fa) for k, fa in enumerate(fits_alone)] + [(-1, jf)]:
                row = {"visit": v, "name": names[v] if v >= 0 else "joint", "channel": j}
                for qname, _ in QUANTITIES:
                    row[qname] = quantity(fa, qname)[0]
                for qname, _ in QUANTITIES:
                    row[_err_name(qname)] = quantity(fa, qname)[1]
                rows.append(row)
            for qname, (chi2, n) in consistency(fits_alone, jf).items():
                crow.append({"channel": j, "quantity": qname, "chi2": chi2, "n_visits": n})
        tables += [("ALONE", _table(rows, ALONE_COLUMNS)),
                   ("CONSISTENCY", _table(crow, CONSISTENCY_COLUMNS))]
    if grid is not None:
        tables.append(("GRID", phase_grid_table(grid)))
    tables += phase_tabs
    hdus = []
    for extname, tab in tables:
        hdu = table_hdu(tab, extname)
        hdu.header["T0"] = (eph.t0, "[d] BJD_TDB of mid-transit (phase 0)")
        hdu.header["PERIOD"] = (eph.period, "[d] orbital period")
        hdu.header["ERRKIND"] = ("1-sigma", "error columns hold standard deviations")
        hdus.append(hdu)
    header = {"NVISITS": (len(lcs), "visits fitted together"),
              "HARMONIC": (int(params["harmonics"]), "harmonics of the planet flux")}
    if grid is not None:
        header["NMODELS"] = (len(grid.names), "systematics models in the grid")
        header["CRITERN"] = (grid.criterion.upper(), "criterion weighting the models")
    write_fits(folder / "planet.fits", hdus, prov, header=header)
    outputs.append(folder / "planet.fits")
    for extname, tab in tables:
        name = {"PLANET": "planet", "DAYNIGHT": "daynight", "PHASEBINS": "phasebins",
                "ALONE": "alone", "CONSISTENCY": "consistency", "GRID": "grid"}.get(extname)
        if name is None:
            name = "phasecurve-" + ("white" if extname == "PHASE_WHITE" else extname[6:])
        write_ecsv(folder / f"{name}.ecsv", tab, prov)
        outputs.append(folder / f"{name}.ecsv")

    figs = []
    if figures:
        from .phasefigures import phase_figures
        figs = phase_figures(folder, fit, points, bins, planet_tab, daynight, times, planet,
                             names)
    w = planet_tab[0]
    metrics = {"white eclipse depth (ppm)": _ppm(w["eclipse_depth"]),
               "white eclipse depth error (ppm)": _ppm(w["eclipse_depth_error"]),
               "white transit depth (ppm)": _ppm(w["transit_depth"]),
               "white transit depth error (ppm)": _ppm(w["transit_depth_error"]),
               "white night side (ppm)": _ppm(w["night_flux"]),
               "white amplitude (ppm)": _ppm(w["amplitude"]),
               "white offset (deg)": _round(w["offset_deg"], 2),
               "white offset error (deg)": _round(w["offset_error_deg"], 2),
               "white rms per degree of freedom (ppm)": _round(w["rms_dof_ppm"], 1),
               "white rms / expected": _round(w["rms_over_expected"], 3),
               "median channel rms / expected":
                   _round(float(np.nanmedian(planet_tab["rms_over_expected"][1:])), 3),
               "visits": len(lcs)}
    if grid is not None:
        order = np.argsort(-grid.weight[:, 0])
        metrics["models"] = len(grid.names)
        metrics[f"white light ranking ({grid.criterion.upper()} weight)"] = [
            f"{grid.names[m]} {grid.weight[m, 0]:.3f}" for m in order[:5] if grid.weight[m, 0] > 0]
        metrics["channels' top models"] = sorted({grid.names[m] for m in grid.best[1:]})
        metrics["failed fits"] = len(grid.failures)
    return outputs, figs, metrics


def _round(x, n):
    x = float(x)
    return round(x, n) if np.isfinite(x) else None


def _ppm(x):
    return _round(float(x) * 1e6, 1)
