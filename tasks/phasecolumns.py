"""Units and meanings of every column of the phase-curve products (tasks/phasecurve.py).

One dict per table, ``{column: (unit, description)}``; the README's tables
of the phase-curve products list the same columns.  A column added to a
table needs its entry here (tests/test_fitter_products.py checks that every
column of every product has a description).
"""

from lightledger.pipeline.programme import QUANTITIES

__all__ = ["DETRENDED_COLUMNS", "PLANET_COLUMNS", "PLANET_GRID_COLUMNS", "PHASE_GRID_COLUMNS",
           "PHASE_COLUMNS", "BIN_COLUMNS", "DAYNIGHT_COLUMNS", "ALONE_COLUMNS",
           "CONSISTENCY_COLUMNS", "COEFFICIENT_COLUMNS", "err_name", "describe"]


def err_name(name):
    """The error column of a planet quantity (``offset_error_deg`` for ``offset_deg``)."""
    return "offset_error_deg" if name == "offset_deg" else f"{name}_error"


#: DETRENDED of a phase-curve fit (per exposure).
DETRENDED_COLUMNS = {
    "exposure": ("", "exposure number in start-time order"),
    "time_bjd_tdb": ("d", "mid-exposure time, BJD_TDB"),
    "exposure_time": ("s", "exposure duration: zero read to last read"),
    "phase": ("", "orbital phase, cycles from mid-transit, in [0, 1)"),
    "used": ("", "True where the exposure entered the fit"),
    "white_detrended": ("", "white flux over the systematics model alone; the star alone = 1"),
    "white_detrended_error": ("", "1-sigma error of white_detrended"),
    "white_systematics": ("electron", "star's flux times the systematics (white band)"),
    "white_model": ("electron", "full model of the white flux"),
    "white_residual": ("", "white_detrended minus the astrophysical model"),
    "detrended": ("", "channel flux over its systematics model alone; the star alone = 1; "
                      "vector over channels"),
    "detrended_error": ("", "1-sigma error of detrended; vector over channels"),
    "systematics": ("electron", "star's flux times the systematics (channel); vector over "
                                "channels"),
    "model": ("electron", "full model of the channel flux; vector over channels"),
    "residual": ("", "detrended minus the astrophysical model; vector over channels"),
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
    "amplitude": ("", "peak-to-trough planet flux over the star's (posterior median)"),
    "amplitude_error": ("", "1-sigma error of amplitude: half the central 68% interval of its "
                            "posterior (the mean of amplitude_error_lo and _hi)"),
    "amplitude_error_lo": ("", "amplitude minus the 15.9th percentile of its posterior (the "
                               "interval's lower side; marginalised like the error over a grid)"),
    "amplitude_error_hi": ("", "84.1st percentile of the amplitude's posterior minus amplitude "
                               "(the interval's upper side)"),
    "offset_deg": ("deg", "orbital angle by which the maximum precedes mid-eclipse (east > 0)"),
    "offset_error_deg": ("deg", "1-sigma error of offset_deg: half the central 68% interval of "
                                "its posterior (the mean of offset_error_lo_deg and _hi_deg)"),
    "offset_error_lo_deg": ("deg", "offset_deg minus the 15.9th percentile of its posterior "
                                   "(about the circular mean; marginalised like the error)"),
    "offset_error_hi_deg": ("deg", "84.1st percentile of the offset's posterior minus offset_deg"),
    "rms_ppm": ("", "rms of the fit's relative residuals, ppm"),
    "rms_dof_ppm": ("", "rms_ppm times sqrt(N / (N - n_params))"),
    "expected_ppm": ("", "rms of the relative errors, ppm"),
    "rms_over_expected": ("", "rms_ppm / expected_ppm"),
    "beta": ("", "time-averaging beta factor of the residuals"),
    "reduced_chi2": ("", "chi-square per degree of freedom"),
    "bic": ("", "Bayesian information criterion"),
    "n_params": ("", "free parameters of the fit"),
    "n_used": ("", "exposures in the fit"),
    "ld_u1": ("", "quadratic limb-darkening u1 of the transit model"),
    "ld_u2": ("", "quadratic limb-darkening u2 of the transit model"),
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
    "weight": ("", "exp(-criterion/2) normalised over the models (white band); times the "
                   "white band's weight as prior (channels)"),
    **{name: ("deg" if name == "offset_deg" else "", f"{name} of this model's fit")
       for name in ("rp_rs", "transit_depth", "eclipse_depth", "night_flux", "max_flux",
                    "min_flux", "amplitude", "offset_deg")},
    **{("offset_error_deg" if name == "offset_deg" else f"{name}_error"):
       ("deg" if name == "offset_deg" else "", f"1-sigma error of {name} of this model's fit")
       for name in ("rp_rs", "transit_depth", "eclipse_depth", "night_flux", "max_flux",
                    "min_flux", "amplitude", "offset_deg")},
    "amplitude_error_lo": ("", "this model's amplitude minus the 15.9th percentile of its "
                               "posterior"),
    "amplitude_error_hi": ("", "84.1st percentile of this model's amplitude posterior minus "
                               "its amplitude"),
    "offset_error_lo_deg": ("deg", "this model's offset_deg minus the 15.9th percentile of its "
                                   "posterior"),
    "offset_error_hi_deg": ("deg", "84.1st percentile of this model's offset posterior minus "
                                   "its offset_deg"),
    "status": ("", "ok, or failed (weight 0; grid.ecsv meta 'failures' says why)"),
}

#: PHASE_WHITE and PHASE_NN: the planet's flux per exposure.
PHASE_COLUMNS = {
    "visit": ("", "visit number (0 = first of the programme)"),
    "exposure": ("", "exposure number in its visit (as in its DETRENDED and light curves)"),
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
    "set_aside": ("", "True: exposure set aside at input (values NaN)"),
    "reason": ("", "why the exposure is not used; empty when used"),
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

#: ALONE: every visit fitted by itself, and the joint fit (visit = -1).
ALONE_COLUMNS = {
    "visit": ("", "visit number; -1 = the joint fit"),
    "name": ("", "visit name"),
    "channel": ("", "channel number; -1 = the white band"),
    **{name: ("deg" if name == "offset_deg" else "", text) for name, text in QUANTITIES},
    **{err_name(name): ("deg" if name == "offset_deg" else "", f"1-sigma error of {name}")
       for name, _ in QUANTITIES},
}

#: CONSISTENCY: chi-square of the single-visit values about the joint one.
CONSISTENCY_COLUMNS = {
    "channel": ("", "channel number; -1 = the white band"),
    "quantity": ("", "which quantity (a column of ALONE)"),
    "chi2": ("", "sum over visits of ((alone - joint) / alone error)^2"),
    "n_visits": ("", "visits that measured the quantity"),
}


#: COEFFICIENTS of a phase-curve fit: one row per light curve.
COEFFICIENT_COLUMNS = {
    "channel": ("", "channel number; -1 = the white band"),
    "wave_lo": ("um", "lower wavelength edge of the band"),
    "wave_hi": ("um", "upper wavelength edge of the band"),
    "model": ("", "top-weighted systematics model of this light curve"),
    "n_terms": ("", "parameters used in values and covariance (the rest NaN)"),
    "names": ("", "comma-separated parameter names, in the order of values: VISIT:NAME for "
                  "visit VISIT's (1 = first) systematics coefficients, planet_* for the "
                  "planet's flux coefficients, rp_rs when the radius was fitted"),
    "values": ("", "fitted values (systematics coefficients in electrons per unit of their "
                   "column; planet coefficients relative to the star)"),
    "covariance": ("", "covariance of values, scaled by error_scale squared; the visits' shape "
                       "parameters marginalised to first order"),
    "error_scale": ("", "sqrt(reduced chi-square) when above 1, else 1"),
    "shapes": ("", "systematics shape parameters chosen, VISIT:NAME=value (days for times)"),
}


def describe(table, columns):
    """Set the unit and description of every column of ``table`` found in ``columns``."""
    for name, (unit, text) in columns.items():
        if name in table.colnames:
            table[name].unit = unit or None
            table[name].description = text
    return table
