"""What a fitter needs to know about the detrend stage's tables, written into them.

The detrend stage's products (DETRENDED, DEPTHS, GRID, COEFFICIENTS and their
ECSV copies) carry, besides the light-curve product's facts
(:mod:`lightledger.tasks.metadata`: target, ephemeris, geometry, limb
darkening, exposure duration, channels, time scales), what the fit itself
decided: the white light's fitted mid-time, a/Rs and inclination where they
were free (:func:`fitted_event`), the limb darkening each channel was fitted
with, and the systematics coefficients of each light curve's top-ranked model
with their covariance (:func:`coefficients_table`).  Every column has a unit
(where it has one) and a description (:func:`describe`).

COEFFICIENTS has one row per light curve (``channel = -1`` the white light):
the top-ranked model, the names of its parameters (``names``, comma-
separated, in the order of the array columns), ``values`` and the
``covariance`` matrix, padded with NaN to the longest list of the table
(``n_terms`` says how many are used).  The parameters are the linear
coefficients a_k of the systematics model S = sum_k a_k B_k (``constant``
first; electrons per unit of column B_k, as defined by the model's tokens in
the README's "Systematics models"), then ``depth``, then for the
white light any free event parameter (``event.t0`` in BJD_TDB days,
``event.a_rs``, ``event.inclination`` in degrees).  The covariance is that of
the fit's linearisation, scaled like the depth error (by the reduced chi-
square when above 1, ``error_scale`` squared); for the white light the
systematics' shape parameters (ramp time scales...) are marginalised out (their
values are in ``shapes``), and the channels were fitted at the white light's
shapes and event, so theirs are conditional on them.
"""

import numpy as np
from astropy.table import Table


__all__ = ["DETRENDED_COLUMNS", "DEPTHS_COLUMNS", "GRID_COLUMNS", "COEFFICIENT_COLUMNS",
           "describe", "fitted_event", "event_cards", "coefficients", "coefficients_table"]

#: DETRENDED columns: (unit, description); vector columns run over the channels.
DETRENDED_COLUMNS = {
    "exposure": ("", "exposure number in start-time order (as in the light curves)"),
    "time_bjd_tdb": ("d", "mid-exposure time, BJD_TDB (barycentric JD, TDB scale)"),
    "exposure_time": ("s", "exposure duration: zero read to last read"),
    "used": ("", "True where the exposure entered the white light's fit"),
    "white_detrended": ("", "white flux / systematics of its top model (1 = the star alone)"),
    "white_detrended_error": ("", "1-sigma error of white_detrended"),
    "white_systematics": ("electron", "white light's star flux x systematics, top model"),
    "white_model": ("electron", "white light's full model (systematics x event), top model"),
    "white_residual": ("", "(white flux - full model) / systematics"),
    "detrended": ("", "channel flux / systematics of its top model; vector over channels"),
    "detrended_error": ("", "1-sigma error of detrended; vector over channels"),
    "systematics": ("electron", "channel star flux x systematics; vector over channels"),
    "model": ("electron", "channel full model (systematics x event); vector over channels"),
    "residual": ("", "(channel flux - full model) / systematics; vector over channels"),
    "set_aside": ("", "True: exposure set aside at input (values NaN)"),
    "reason": ("", "why the exposure is not used; empty when used"),
}

#: DEPTHS columns: (unit, description).
DEPTHS_COLUMNS = {
    "channel": ("", "channel number (-1 = the white band)"),
    "wave_lo": ("um", "lower wavelength edge of the band"),
    "wave_hi": ("um", "upper wavelength edge of the band"),
    "wave_mid": ("um", "centre of the band, (wave_lo + wave_hi) / 2"),
    "depth": ("", "event depth marginalised over the model grid (DEPTHIS)"),
    "depth_error": ("", "1-sigma error of depth, including error_models"),
    "error_models": ("", "part of depth_error from the spread between the models"),
    "best_model": ("", "top-ranked systematics model (highest weight)"),
    "best_weight": ("", "weight of best_model (CRITERN)"),
    "depth_best": ("", "depth of best_model alone"),
    "error_covariance": ("", "best_model's depth error from its covariance"),
    "error_beta": ("", "best_model's depth error times the beta factor (>= 1)"),
    "error_permutation": ("", "best_model's depth error from residual permutation"),
    "error_inherited": ("", "part of each of best_model's errors inherited from the white fit"),
    "rms_ppm": ("", "rms of best_model's residuals, ppm"),
    "rms_dof_ppm": ("", "rms_ppm x sqrt(N / (N - n_params)), ppm"),
    "expected_ppm": ("", "rms expected from the error bars, ppm"),
    "rms_over_expected": ("", "rms_dof_ppm / expected_ppm"),
    "beta": ("", "time-averaging beta factor of the residuals"),
    "reduced_chi2": ("", "chi-square per degree of freedom of best_model"),
    "bic": ("", "Bayesian information criterion of best_model"),
    "n_params": ("", "free parameters of best_model's fit"),
    "n_used": ("", "exposures in best_model's fit"),
    "tau_min": ("min", "ramp time scale of best_model (NaN without a ramp)"),
    "shape_at_edge": ("", "shape parameters left at the end of their searched range"),
    "ld_u1": ("", "quadratic limb-darkening u1 used for this band"),
    "ld_u2": ("", "quadratic limb-darkening u2 used for this band"),
    "fitted": ("", "False for a channel left out of the fit (see note)"),
    "unphysical": ("", "depth below -3 errors or hiding the whole flux"),
    "noisy": ("", "residual rms above 5x the expected"),
    "note": ("", "why a channel was not fitted, else empty"),
    "dim": ("", "True for a channel with little light (bin CHANNELS dim)"),
}

#: GRID columns: (unit, description).
GRID_COLUMNS = {
    "model": ("", "systematics model (its white-light form for channel -1)"),
    "model_index": ("", "index of the model in the grid (MODEL_NN of grid-models.fits)"),
    "channel": ("", "channel number (-1 = the white band)"),
    "rank": ("", "rank of the model for this light curve (1 = top weight)"),
    "n_params": ("", "free parameters of the fit"),
    "n_points": ("", "exposures in the fit"),
    "chi2": ("", "chi-square of the fit"),
    "bic": ("", "Bayesian information criterion"),
    "aic": ("", "Akaike information criterion"),
    "weight": ("", "model weight for this light curve (CRITERN)"),
    "depth": ("", "event depth of this model"),
    "depth_error": ("", "depth error carried (ERRKIND)"),
    "error_covariance": ("", "depth error from the covariance"),
    "error_beta": ("", "depth error times the beta factor (>= 1)"),
    "beta": ("", "time-averaging beta factor of the residuals"),
    "error_permutation": ("", "depth error from residual permutation"),
    "error_inherited": ("", "part of each depth error inherited from the white fit (0 for it)"),
    "shapes": ("", "shape parameters of the model's white fit (days for times)"),
    "t0": ("d", "white fit's mid-transit time, BJD_TDB"),
    "t0_error": ("d", "1-sigma error of t0 (NaN when not fitted)"),
    "a_rs": ("", "white fit's semi-major axis / stellar radius"),
    "a_rs_error": ("", "1-sigma error of a_rs (NaN when not fitted)"),
    "inclination": ("deg", "white fit's orbital inclination"),
    "inclination_error": ("deg", "1-sigma error of inclination (NaN when not fitted)"),
    "status": ("", "'ok' or 'failed' (the failures in the metadata)"),
}

#: COEFFICIENTS columns: (unit, description).
COEFFICIENT_COLUMNS = {
    "channel": ("", "channel number (-1 = the white band)"),
    "wave_lo": ("um", "lower wavelength edge of the band"),
    "wave_hi": ("um", "upper wavelength edge of the band"),
    "model": ("", "top-ranked systematics model of this light curve"),
    "n_terms": ("", "parameters used in values and covariance (the rest NaN)"),
    "names": ("", "comma-separated parameter names, in the order of values"),
    "values": ("", "fitted values (coefficients in electrons, event.t0 BJD_TDB d)"),
    "covariance": ("", "covariance of values, scaled like the depth error"),
    "error_scale": ("", "sqrt(reduced chi-square) when above 1, else 1"),
    "shapes": ("", "systematics shape parameters held fixed (days for times)"),
}


def describe(table, columns):
    """Set the unit and description of every column of ``table`` found in ``columns``.

    Returns the names of the table's columns that ``columns`` does not
    describe (an empty list when every column is described).
    """
    missing = []
    for name in table.colnames:
        if name not in columns:
            missing.append(name)
            continue
        unit, text = columns[name]
        table[name].unit = unit or None
        table[name].description = text
    return missing


def fitted_event(grid):
    """The white light's event as fitted by its top-ranked model.

    Returns
    -------
    dict
        For ``t0`` (BJD_TDB, d), ``a_rs`` and ``inclination`` (deg):
        ``{"value": v, "error": e or None, "fitted": bool}`` (a priori values
        have no error), plus ``"shapes"``: the white fit's shape parameters.
    """
    white = grid.white_fits[grid.white_owner[grid.best[0]]]
    out = {}
    for name in ("t0", "a_rs", "inclination"):
        fitted = name in white.event_errors
        out[name] = {"value": float(white.event[name]),
                     "error": float(white.event_errors[name]) if fitted else None,
                     "fitted": bool(fitted)}
    out["shapes"] = {k: float(v) for k, v in white.shapes.items()}
    return out


def event_cards(event):
    """FITS cards of :func:`fitted_event`: T0FIT, ARSFIT, INCFIT and their errors."""
    cards = []
    for key, name, unit in (("T0FIT", "t0", "[d] BJD_TDB mid-transit, "),
                            ("ARSFIT", "a_rs", ""), ("INCFIT", "inclination", "[deg] ")):
        e = event[name]
        cards.append((key, e["value"], f"{unit}{'fitted' if e['fitted'] else 'a priori'} {name}"))
        if e["fitted"]:
            cards.append((key[:-3] + "ERR", e["error"], f"1-sigma error of {key}"))
    return cards


def _with_derived_depth(names, values, cov, gradient):
    """Append the depth as a derived parameter (value, covariance through its gradient)."""
    g = np.asarray(gradient, float)
    cg = cov @ g
    full = np.zeros((cov.shape[0] + 1,) * 2)
    full[:-1, :-1] = cov
    full[:-1, -1] = full[-1, :-1] = cg
    full[-1, -1] = g @ cg
    return names, values, full


def coefficients(fit, white=None):
    """Names, values and covariance of one light curve's fit.

    Parameters
    ----------
    fit : DetrendResult
        A light curve's fit (``coefficients``, ``coefficient_names``,
        ``covariance`` of the coefficients and the depth, ``error_scale``).
    white : WhiteFit, optional
        For the white light: its linearisation gives the covariance of the
        linear terms, the depth and the free event parameters with the shape
        parameters marginalised out.

    Returns
    -------
    (tuple of str, ndarray, ndarray)
        Names, values (n,), covariance (n, n) scaled by ``error_scale**2``.
    """
    coef = np.asarray(fit.coefficients, float)
    names = list(fit.coefficient_names)
    if len(names) != coef.size:
        names = [f"c{k}" for k in range(coef.size)]
    scale = float(fit.error_scale) ** 2
    if white is not None:
        lin = white.linearisation
        nonlinear = [k for k, _ in fit.shapes]
        n_lin = lin.parameters.size - len(nonlinear)
        if n_lin in (coef.size, coef.size + 1):
            cov = lin.covariance()      # as the depth error (time scales held within their prior)
            has_depth = n_lin == coef.size + 1
            keep = list(range(n_lin))
            extra = [(j, k) for j, k in enumerate(nonlinear) if k.startswith("event.")]
            keep += [n_lin + j for j, _ in extra]
            cov = cov[np.ix_(keep, keep)]
            event_values = [float(white.event[k.split(".", 1)[1]]) for _, k in extra]
            values = np.concatenate([coef, [fit.depth] if has_depth else [], event_values])
            out_names = names + (["depth"] if has_depth else []) + [k for _, k in extra]
            if not has_depth:
                grad = lin.depth_gradient[keep]
                out_names, values, cov = _with_derived_depth(out_names + ["depth"],
                                                             np.r_[values, fit.depth], cov, grad)
            return tuple(out_names), values, cov * scale
    cov = np.asarray(fit.covariance, float)
    return tuple(names + ["depth"]), np.r_[coef, fit.depth], cov * scale


def coefficients_table(grid, bands):
    """COEFFICIENTS: one row per light curve, its top model's parameters and covariance.

    Parameters
    ----------
    grid : GridFit
    bands : sequence of (channel, wave_lo, wave_hi)
        One per light curve in the grid's order (white light first, as -1).

    Returns
    -------
    astropy.table.Table
        Columns of :data:`COEFFICIENT_COLUMNS`; light curves not fitted have
        ``n_terms = 0`` and NaN arrays.
    """
    rows = []
    for c, (j, lo, hi) in enumerate(bands):
        m = int(grid.best[c])
        fit = grid.fits[m][c] if m >= 0 else None
        if fit is None:
            rows.append((j, lo, hi, "", (), np.zeros(0), np.zeros((0, 0)), np.nan, ""))
            continue
        white = grid.white_fits[grid.white_owner[m]]
        names, values, cov = coefficients(fit, white if c == 0 else None)
        shapes = ", ".join(f"{k}={v:.6g}" for k, v in sorted(white.shapes.items()))
        rows.append((j, lo, hi, grid.specs[m].white_name if c == 0 else grid.specs[m].name,
                     names, values, cov, float(fit.error_scale), shapes))
    return padded_coefficients(rows, COEFFICIENT_COLUMNS)


def padded_coefficients(rows, columns):
    """The COEFFICIENTS table from one row per light curve, values and covariance NaN-padded.

    Parameters
    ----------
    rows : list of tuple
        ``(channel, wave_lo, wave_hi, model, names, values, covariance,
        error_scale, shapes)`` per light curve; ``values`` (K,) and
        ``covariance`` (K, K) with K = ``len(names)``.
    columns : dict
        Column name to (unit, description) (:func:`describe`).

    Returns
    -------
    astropy.table.Table
        ``values`` (n, K_max) and ``covariance`` (n, K_max, K_max), NaN past
        each row's ``n_terms``.
    """
    k = max([len(r[4]) for r in rows] + [1])
    values = np.full((len(rows), k), np.nan)
    covariance = np.full((len(rows), k, k), np.nan)
    for i, r in enumerate(rows):
        n = len(r[4])
        values[i, :n] = r[5]
        covariance[i, :n, :n] = r[6]
    table = Table()
    table["channel"] = [r[0] for r in rows]
    table["wave_lo"] = [float(r[1]) for r in rows]
    table["wave_hi"] = [float(r[2]) for r in rows]
    table["model"] = [r[3] for r in rows]
    table["n_terms"] = [len(r[4]) for r in rows]
    table["names"] = [",".join(r[4]) for r in rows]
    table["values"] = values
    table["covariance"] = covariance
    table["error_scale"] = [r[7] for r in rows]
    table["shapes"] = [r[8] for r in rows]
    describe(table, columns)
    return table
