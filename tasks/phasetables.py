"""The phase-curve products' tables, built from the fits (written by :mod:`.phasecurve`).

DETRENDED of each visit (every exposure, with why any is not used), PHASE_WHITE
and PHASE_NN (the planet's flux per exposure), the rows of PLANET (one fit's,
then marginalised over the grid), GRID (every model's fit of every light
curve), and a programme's ALONE and CONSISTENCY.  Column meanings come from
:mod:`.phasecolumns`.
"""

import numpy as np
from astropy.table import Table, vstack

from lightledger.pipeline.diagnostics import residual_quality
from lightledger.pipeline.phasegrid import PLANET_QUANTITIES, planet_interval
from lightledger.pipeline.programme import QUANTITIES, consistency, quantity

from .detrendtables import with_reasons
from .lightcurves import expand_rows
from .phasecolumns import (ALONE_COLUMNS, CONSISTENCY_COLUMNS, DETRENDED_COLUMNS, PHASE_COLUMNS,
                           PHASE_GRID_COLUMNS, describe, err_name)

__all__ = ["phase_grid_table"]


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
