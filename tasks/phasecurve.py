"""Phase-curve products: the full-orbit fit of one visit or of a programme of visits.

Shared by the detrend stage of a ``phase-curve`` visit and by the programme's
``joint`` stage: both fit :func:`lightledger.pipeline.programme.fit_programme`
(once per systematics model of their grid) and write the same products into
their folder.

``detrended.fits`` (one visit) or ``detrended-N.fits`` (visit N of a programme)
    DETRENDED: per exposure of the visit (set-aside ones included, NaN, with
    their reason), the white and channel flux divided by the systematics
    alone (the star alone = 1: transits, eclipses and the phase variation
    stay in), errors, systematics, models, residuals;
``grid-models.fits`` (one visit) or ``grid-models-N.fits``
    one DETRENDED table per model of the grid (MODEL_NN, NN its
    ``model_index`` in GRID; a model that failed has NaN values);
``planet.fits``
    PLANET (per channel and the white band as ``channel = -1``: radius ratio,
    transit and eclipse depths, night side, extremes, amplitude and hotspot
    offset with the two sides of their 68 % intervals, fit quality, limb
    darkening), DAYNIGHT (day-side and night-side spectra), PHASEBINS
    (phase-resolved spectrum), GRID (every model's fit), COEFFICIENTS (each
    light curve's fitted parameters with their covariance), PHASE_WHITE and
    PHASE_NN (per exposure, set-aside ones included: time, orbital phase,
    the planet's flux over the star's, error, model); a programme adds ALONE
    (each visit fitted by itself beside the joint fit) and CONSISTENCY
    (their chi-square);
ECSV copies of every table, and the figures ``phasecurve.png``,
``phasecurve-channels.png``, ``phasespectra.png`` and ``residuals.png``.

Every table's header (and every ECSV copy's metadata) carries what a fitter
needs (:mod:`.phasemeta`: target, ephemeris, orbit, limb darkening, exposure
duration, time scales, the white band's fitted planet).  Column meanings are
declared once in :mod:`.phasecolumns` and documented in the README.
"""

import numpy as np
from astropy.table import Table, vstack

from lightledger.pipeline.diagnostics import residual_quality
from lightledger.pipeline.jointfit import PlanetModel
from lightledger.pipeline.orbit import Ephemeris
from lightledger.pipeline.phasegrid import (PLANET_QUANTITIES, marginal_interval,
                                            planet_interval)
from lightledger.pipeline.programme import (QUANTITIES, VisitCurves, consistency,
                                            phase_resolved_spectrum, planet_flux_points, quantity)

from .detrendsetup import systematics_setup
from .detrendtables import with_reasons
from .lightcurves import expand_rows, usable_rows, wide_table
from .metadata import set_time_keywords
from .phasecolumns import (ALONE_COLUMNS, BIN_COLUMNS, CONSISTENCY_COLUMNS, DAYNIGHT_COLUMNS,
                           DETRENDED_COLUMNS, PHASE_COLUMNS, PHASE_GRID_COLUMNS, PLANET_COLUMNS,
                           PLANET_GRID_COLUMNS, describe, err_name)
from .phasemeta import coefficients_table, phase_cards, phase_meta, planet_cards
from .products import table_hdu, write_ecsv, write_fits

__all__ = ["planet_model", "visit_curves", "write_phase_products", "phase_grid_table",
           "DETRENDED_COLUMNS", "PLANET_COLUMNS", "PLANET_GRID_COLUMNS", "PHASE_GRID_COLUMNS",
           "PHASE_COLUMNS", "BIN_COLUMNS", "DAYNIGHT_COLUMNS", "ALONE_COLUMNS",
           "CONSISTENCY_COLUMNS"]

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
    """DETRENDED of visit ``k``'s fitted exposures from a ProgrammeFit (None: NaN values)."""
    n, n_ch = len(lc), np.shape(lc["flux"])[1]
    det = Table()
    det["exposure"] = np.asarray(lc["exposure"], int)
    det["time_bjd_tdb"] = np.asarray(lc["time_bjd_tdb"], float)
    if "exposure_time" in lc.colnames:
        det["exposure_time"] = np.asarray(lc["exposure_time"], float)
    det["phase"] = phase
    if fit is None:
        det["used"] = np.zeros(n, bool)
        for name in ("white_detrended", "white_detrended_error", "white_systematics",
                     "white_model", "white_residual"):
            det[name] = np.full(n, np.nan)
        for name in ("detrended", "detrended_error", "systematics", "model", "residual"):
            det[name] = np.full((n, n_ch), np.nan)
        return describe(det, DETRENDED_COLUMNS)
    white = fit.white.visits[k]
    chans = [c.visits[k] for c in fit.channels]

    def stack(attr):
        return np.stack([getattr(c, attr) for c in chans], axis=1)

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
    return describe(det, DETRENDED_COLUMNS)


def _visit_detrended(lc, lc_all, k, fit, eph):
    """DETRENDED of visit ``k``: every exposure of its LIGHTCURVES, with why any is not used."""
    phase = np.mod((np.asarray(lc["time_bjd_tdb"], float) - eph.t0) / eph.period, 1.0)
    det = _detrended_table(lc, k, fit, phase)
    # the first orbit was left out when none of its exposures entered the fit
    first = np.asarray(lc["first_orbit"], bool)
    used = np.asarray(det["used"], bool)
    left_out = first if first.any() and not np.any(used[first]) and fit is not None \
        else np.zeros_like(first)
    det = with_reasons(det, lc, lc_all, left_out)
    t_all = np.asarray(det["time_bjd_tdb"], float)   # a set-aside exposure's phase, from its time
    det["phase"] = np.mod((t_all - eph.t0) / eph.period, 1.0)
    return describe(det, DETRENDED_COLUMNS)


def _phase_table(points, dets):
    """PHASE_WHITE or PHASE_NN: the fitted exposures' planet flux, completed to every exposure.

    ``dets`` are the visits' DETRENDED tables (every exposure, in the order
    of their LIGHTCURVES): a set-aside exposure gets a row with NaN values and
    its ``reason``.
    """
    parts = []
    for k, det in enumerate(dets):
        sel = points.visit == k
        t = Table({"visit": points.visit[sel], "time_bjd_tdb": points.time[sel],
                   "phase": points.phase[sel], "planet_flux": points.planet_flux[sel],
                   "planet_error": points.planet_error[sel], "model": points.model[sel],
                   "visible": points.visible[sel], "blocked": points.blocked[sel],
                   "used": points.used[sel], "in_event": points.in_event[sel]})
        t = expand_rows(t, ~np.asarray(det["set_aside"], bool))
        t["visit"] = np.full(len(t), k)
        t["time_bjd_tdb"] = np.asarray(det["time_bjd_tdb"], float)
        t["phase"] = np.asarray(det["phase"], float)
        t.add_column(np.asarray(det["exposure"], int), name="exposure", index=1)
        t["set_aside"] = np.asarray(det["set_aside"], bool)
        t["reason"] = np.asarray(det["reason"], str)
        parts.append(t)
    return describe(vstack(parts, metadata_conflicts="silent"), PHASE_COLUMNS)


def _planet_row(j, lo, hi, jf, planet):
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
            "amplitude_error_lo": pick("amplitude_error_lo"),
            "amplitude_error_hi": pick("amplitude_error_hi"),
            "offset_deg": pick("offset_deg"), "offset_error_deg": pick("offset_error_deg"),
            "offset_error_lo_deg": pick("offset_error_lo_deg"),
            "offset_error_hi_deg": pick("offset_error_hi_deg"),
            "rms_ppm": q.rms * 1e6, "rms_dof_ppm": q.rms_dof * 1e6,
            "expected_ppm": q.expected * 1e6,
            "rms_over_expected": q.rms / q.expected if q.expected else nan, "beta": q.beta,
            "reduced_chi2": jf.reduced_chi2, "bic": jf.bic, "n_params": jf.n_params,
            "n_used": q.n_used, "ld_u1": float(planet.u1), "ld_u2": float(planet.u2)}


def _with_grid(row, grid, c, sides):
    """A PLANET row with every planet quantity marginalised over the grid (light curve ``c``).

    ``sides``: ``{name: (lo, hi)}`` of :func:`~lightledger.pipeline.phasegrid.marginal_interval`.
    """
    out = dict(row)
    for name in PLANET_QUANTITIES:
        out[name] = float(grid.value[name][c])
        out[err_name(name)] = float(grid.error[name][c])
    for name, (lo, hi) in sides.items():
        out[f"{name}_error_lo" if name == "amplitude" else "offset_error_lo_deg"] = float(lo[c])
        out[f"{name}_error_hi" if name == "amplitude" else "offset_error_hi_deg"] = float(hi[c])
    m = int(grid.best[c])
    out["best_model"] = grid.names[m]
    out["best_weight"] = float(grid.weight[m, c])
    out["n_models"] = int(np.sum(np.isfinite(grid.chi2[:, c])))
    for name in ("eclipse_depth", "transit_depth", "amplitude"):
        out[f"{name}_models"] = float(grid.between[name][c])
    return out


def phase_grid_table(grid):
    """GRID of a phase-curve fit: one row per model and light curve (channel -1 = white band)."""
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
                row[err_name(q)] = float(grid.errors[q][m, c])
            sides = {q: planet_interval(grid.fit_of(m, c), q)
                     if grid.fits[m] is not None and np.isfinite(grid.chi2[m, c])
                     else (float("nan"), float("nan")) for q in ("amplitude", "offset_deg")}
            row["amplitude_error_lo"], row["amplitude_error_hi"] = sides["amplitude"]
            row["offset_error_lo_deg"], row["offset_error_hi_deg"] = sides["offset_deg"]
            row["status"] = "ok" if np.isfinite(grid.chi2[m, c]) else "failed"
            rows.append(row)
    table = _table(rows, PHASE_GRID_COLUMNS)
    table.meta["criterion"] = grid.criterion
    table.meta["failures"] = list(grid.failures)
    return table


def _table(rows, columns):
    return describe(Table(rows=rows, names=list(rows[0])), columns)


def write_phase_products(folder, prov, fit, lcs, channels, white_band, planet, params, *,
                         names, target, event, alone=None, figures=True, grid=None):
    """Write every phase-curve product of a fit into ``folder``.

    Parameters
    ----------
    folder : Path
    prov : Provenance
    fit : ProgrammeFit
    lcs : list of astropy Table
        Each visit's LIGHTCURVES (every exposure; set-aside ones are not fitted
        but keep their rows in DETRENDED and the PHASE tables).
    channels : astropy Table
        CHANNELS (wave_lo, wave_hi per channel).
    white_band : (float, float)
        White band edges, um.
    planet : PlanetModel
    params : dict
        ``harmonics``, ``fit_radius``, ``phase_bins``.
    names : list of str
        Visit names.
    target, event : dict
        The target (``name``, ``ra``, ``dec``) and the planet's ephemeris,
        geometry and limb darkening, for the products' metadata
        (:mod:`.phasemeta`).
    alone : list of ProgrammeFit, optional
        Each visit fitted by itself (programmes).
    figures : bool
        Draw the figures.
    grid : PhaseGrid, optional
        The fits of a grid of systematics models
        (:func:`lightledger.pipeline.phasegrid.fit_phase_grid`; ``fit`` is
        then its :meth:`~lightledger.pipeline.phasegrid.PhaseGrid.top_fit`):
        PLANET and DAYNIGHT carry the marginalised quantities, with the
        :data:`PLANET_GRID_COLUMNS`, a GRID table (``grid.ecsv``) lists
        every model's fit and ``grid-models[-N].fits`` every model's
        detrended light curves.

    Returns
    -------
    (outputs, figures, metrics)
        Paths written, figure paths, headline figures for the entry.
    """
    eph = planet.ephemeris
    lcs_all = lcs
    lcs = [lc[usable_rows(lc)] for lc in lcs_all]        # the exposures fitted
    times = [np.asarray(lc["time_bjd_tdb"], float) for lc in lcs]
    texp = np.concatenate([np.asarray(lc["exposure_time"], float) if "exposure_time"
                           in lc.colnames else np.full(len(lc), np.nan) for lc in lcs])
    n_ch = len(channels)
    single = len(lcs) == 1
    all_fits = [(-1, white_band[0], white_band[1], fit.white)] + [
        (j, float(channels["wave_lo"][j]), float(channels["wave_hi"][j]), jf)
        for j, jf in enumerate(fit.channels)]
    planet_rows = [_planet_row(j, lo, hi, jf, planet) for j, lo, hi, jf in all_fits]
    if grid is not None:
        sides = {name: marginal_interval(grid, name) for name in ("amplitude", "offset_deg")}
        planet_rows = [_with_grid(row, grid, c, sides) for c, row in enumerate(planet_rows)]
    planet_tab = _table(planet_rows, {**PLANET_COLUMNS, **PLANET_GRID_COLUMNS})
    cards = phase_cards(target, event, np.concatenate(times), texp, n_ch) + planet_cards(
        planet_tab[0]) + [("NVISITS", len(lcs), "visits fitted together"),
                          ("HARMONIC", int(params["harmonics"]), "harmonics of the planet flux")]
    meta = phase_meta(target, event, np.concatenate(times), texp, channels, planet_tab[0], names)
    primary = {"TIMESYS": "TDB", "TIMEREF": "SOLARSYSTEM", **{k: (v, c) for k, v, c in cards[:4]}}

    def hdu_of(table, extname):
        hdu = set_time_keywords(table_hdu(table, extname))
        for key, value, comment in cards:
            hdu.header[key] = (value, comment)
        return hdu

    def ecsv(path, table):
        table = table.copy(copy_data=False)
        own = dict(table.meta)
        table.meta.clear()
        table.meta.update(meta)
        table.meta.update(own)
        write_ecsv(path, table, prov)
        outputs.append(path)

    outputs, dets = [], []
    for k, lc in enumerate(lcs):
        det = _visit_detrended(lc, lcs_all[k], k, fit, eph)
        dets.append(det)
        stem = "detrended" if single else f"detrended-{k + 1}"
        hdu = hdu_of(det, "DETRENDED")
        hdu.header["VISITNAM"] = (names[k][:60], "visit name")
        hdu.header["NORM"] = ("star alone", "detrended flux: 1 = the star alone")
        write_fits(folder / f"{stem}.fits", [hdu], prov, header=primary)
        outputs.append(folder / f"{stem}.fits")
        ecsv(folder / f"{stem}.ecsv", wide_table(det, n_ch, channels))
        if grid is not None:
            hdus = []
            for m, name in enumerate(grid.names):
                hdu = hdu_of(_visit_detrended(lc, lcs_all[k], k, grid.fits[m], eph),
                             f"MODEL_{m:02d}")
                hdu.header["MODEL"] = (name[:60], "systematics model")
                hdu.header["STATUS"] = ("ok" if grid.fits[m] is not None else "failed",
                                        "failed: not fitted, values NaN")
                hdus.append(hdu)
            path = folder / ("grid-models.fits" if single else f"grid-models-{k + 1}.fits")
            write_fits(path, hdus, prov, header=primary)
            outputs.append(path)

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
    phase_tabs = [("PHASE_WHITE" if j < 0 else f"PHASE_{j:02d}", _phase_table(p, dets))
                  for (j, _, _, _), p in zip(all_fits, points)]
    tables = [("PLANET", planet_tab), ("DAYNIGHT", daynight), ("PHASEBINS", bin_tab)]
    if alone is not None:
        tables += _alone_tables(all_fits, fit, alone, names)
    if grid is not None:
        tables.append(("GRID", phase_grid_table(grid)))
    models = ([grid.names[int(m)] for m in grid.best] if grid is not None
              else [""] * len(all_fits))
    tables.append(("COEFFICIENTS", coefficients_table([r[:3] for r in all_fits],
                                                      [r[3] for r in all_fits], models)))
    tables += phase_tabs
    hdus = []
    for extname, tab in tables:
        hdu = hdu_of(tab, extname)
        hdu.header["ERRKIND"] = ("1-sigma", "error columns hold standard deviations")
        hdus.append(hdu)
    header = dict(primary)
    if grid is not None:
        header["NMODELS"] = (len(grid.names), "systematics models in the grid")
        header["CRITERN"] = (grid.criterion.upper(), "criterion weighting the models")
    write_fits(folder / "planet.fits", hdus, prov, header=header)
    outputs.append(folder / "planet.fits")
    for extname, tab in tables:
        name = {"PLANET": "planet", "DAYNIGHT": "daynight", "PHASEBINS": "phasebins",
                "ALONE": "alone", "CONSISTENCY": "consistency", "GRID": "grid",
                "COEFFICIENTS": "coefficients"}.get(extname)
        if name is None:
            name = "phasecurve-" + ("white" if extname == "PHASE_WHITE" else extname[6:])
        ecsv(folder / f"{name}.ecsv", tab)

    figs = []
    if figures:
        from .phasefigures import phase_figures
        figs = phase_figures(folder, fit, points, bins, planet_tab, daynight, times, planet,
                             names)
    return outputs, figs, _metrics(planet_tab, grid, len(lcs))


def _alone_tables(all_fits, fit, alone, names):
    """ALONE (each visit fitted by itself, and the joint fit) and CONSISTENCY."""
    rows, crow = [], []
    for (j, _, _, jf), pick in zip(all_fits, [lambda f: f.white] + [
            (lambda f, jj=jj: f.channels[jj]) for jj in range(len(fit.channels))]):
        fits_alone = [pick(a) for a in alone]
        for v, fa in [(k, fa) for k, fa in enumerate(fits_alone)] + [(-1, jf)]:
            row = {"visit": v, "name": names[v] if v >= 0 else "joint", "channel": j}
            for qname, _ in QUANTITIES:
                row[qname] = quantity(fa, qname)[0]
            for qname, _ in QUANTITIES:
                row[err_name(qname)] = quantity(fa, qname)[1]
            rows.append(row)
        for qname, (chi2, n) in consistency(fits_alone, jf).items():
            crow.append({"channel": j, "quantity": qname, "chi2": chi2, "n_visits": n})
    return [("ALONE", _table(rows, ALONE_COLUMNS)),
            ("CONSISTENCY", _table(crow, CONSISTENCY_COLUMNS))]


def _metrics(planet_tab, grid, n_visits):
    """Headline figures of the entry."""
    w = planet_tab[0]
    metrics = {"white eclipse depth (ppm)": _ppm(w["eclipse_depth"]),
               "white eclipse depth error (ppm)": _ppm(w["eclipse_depth_error"]),
               "white transit depth (ppm)": _ppm(w["transit_depth"]),
               "white transit depth error (ppm)": _ppm(w["transit_depth_error"]),
               "white night side (ppm)": _ppm(w["night_flux"]),
               "white amplitude (ppm)": _ppm(w["amplitude"]),
               "white amplitude error (ppm)": _ppm(w["amplitude_error"]),
               "white amplitude error below, above (ppm)": [_ppm(w["amplitude_error_lo"]),
                                                            _ppm(w["amplitude_error_hi"])],
               "white offset (deg)": _round(w["offset_deg"], 2),
               "white offset error (deg)": _round(w["offset_error_deg"], 2),
               "white offset error below, above (deg)": [_round(w["offset_error_lo_deg"], 2),
                                                         _round(w["offset_error_hi_deg"], 2)],
               "white rms per degree of freedom (ppm)": _round(w["rms_dof_ppm"], 1),
               "white rms / expected": _round(w["rms_over_expected"], 3),
               "median channel rms / expected":
                   _round(float(np.nanmedian(planet_tab["rms_over_expected"][1:])), 3),
               "visits": n_visits}
    if grid is not None:
        order = np.argsort(-grid.weight[:, 0])
        metrics["models"] = len(grid.names)
        metrics[f"white light ranking ({grid.criterion.upper()} weight)"] = [
            f"{grid.names[m]} {grid.weight[m, 0]:.3f}" for m in order[:5] if grid.weight[m, 0] > 0]
        metrics["channels' top models"] = sorted({grid.names[m] for m in grid.best[1:]})
        metrics["failed fits"] = len(grid.failures)
    return metrics


def _round(x, n):
    x = float(x)
    return round(x, n) if np.isfinite(x) else None


def _ppm(x):
    return _round(float(x) * 1e6, 1)
