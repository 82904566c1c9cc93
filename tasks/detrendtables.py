"""The detrend product's tables: DETRENDED, DEPTHS and GRID, built from a model grid's fits.

DETRENDED holds each light curve divided by its model's systematics
(:func:`star_alone`: the star alone, the whole astrophysical signal kept),
completed to every exposure of the visit with why each is not used
(:func:`with_reasons`); DEPTHS the marginalised depth of every light curve and
its top model's fit quality; GRID one row per model and light curve
(:func:`grid_table`).  Column units and descriptions live in
:mod:`.detrendmeta`; the detrend task (:mod:`.detrend`) writes the tables.
"""

import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.diagnostics import residual_quality

from .detrendmeta import DEPTHS_COLUMNS, DETRENDED_COLUMNS, GRID_COLUMNS, describe
from .lightcurves import set_aside_rows, usable_rows

__all__ = ["REASONS", "with_reasons", "star_alone", "read_depths", "grid_table"]


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
