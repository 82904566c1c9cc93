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
declared once in :mod:`.phasecolumns` and documented in the README; the tables
are built in :mod:`.phasetables` (its names are re-exported here).
"""

import numpy as np

from lightledger.pipeline.jointfit import PlanetModel
from lightledger.pipeline.orbit import Ephemeris
from lightledger.pipeline.phasegrid import marginal_interval
from lightledger.pipeline.programme import (VisitCurves, phase_resolved_spectrum,
                                            planet_flux_points)

from .detrendsetup import systematics_setup
from .lightcurves import usable_rows, wide_table
from .metadata import set_time_keywords
from .phasecolumns import (ALONE_COLUMNS, BIN_COLUMNS, CONSISTENCY_COLUMNS, DAYNIGHT_COLUMNS,
                           DETRENDED_COLUMNS, PHASE_COLUMNS, PHASE_GRID_COLUMNS, PLANET_COLUMNS,
                           PLANET_GRID_COLUMNS)
from .phasemeta import coefficients_table, phase_cards, phase_meta, planet_cards
from .phasetables import (_alone_tables, _detrended_table, _phase_table,  # noqa: F401
                          _planet_row, _table, _visit_detrended, _with_grid, phase_grid_table)
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
