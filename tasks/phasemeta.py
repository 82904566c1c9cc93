"""What a fitter needs to know about the phase-curve products, written into them.

The phase-curve products (``planet.fits`` and its tables, ``detrended.fits``
or ``detrended-N.fits``, their ECSV copies) carry the facts of the
transit/eclipse products (:mod:`lightledger.tasks.metadata`: target and
coordinates, ephemeris, geometry, limb darkening, exposure duration, channels,
time scales) with what differs for a whole orbit: no single observed event
(EPHTEVT, EPHDUR are left out), the orbit's eccentricity and argument of
periastron (GEOECC, GEOOMEGA; they place the eclipses), the event geometry
held at its a priori values (T0FIT, ARSFIT, INCFIT say "a priori"), and the
white band's fitted planet with its errors:

========  ===========================================================
PLRPRS    white band's radius ratio (PLRPRSE its error; a priori, no
          error, without a transit in the data)
PLDAY     day side: planet flux over the star's at mid-eclipse (PLDAYE)
PLNIGHT   night side, at mid-transit (PLNIGHTE)
PLAMP     peak-to-trough amplitude, posterior median (PLAMPE half the
          central 68 % interval; PLAMPLO, PLAMPHI its two sides)
PLOFFS    hotspot offset, deg (PLOFFSE; PLOFFSLO, PLOFFSHI)
NVISITS   visits fitted together
HARMONIC  harmonics of the planet's flux
========  ===========================================================

The ECSV copies hold the same facts in their metadata (``target``,
``event`` with ``kind = 'phase-curve'``, ``geometry``, ``limb_darkening``,
``exposure_time_s``, ``channels``, ``time_columns``, ``fitted_event``,
``fitted_planet``, ``visits``).  COEFFICIENTS (:func:`coefficients_table`)
gives each light curve's fitted parameters with their covariance.
"""

import math
from types import SimpleNamespace

import numpy as np
from astropy.table import Table

from .detrendmeta import event_cards, padded_coefficients
from .metadata import ecsv_meta, fits_cards
from .phasecolumns import COEFFICIENT_COLUMNS, describe

__all__ = ["phase_cards", "phase_meta", "a_priori_event", "planet_cards", "fitted_planet",
           "coefficients_table"]

#: Cards of the transit/eclipse products that a whole orbit does not have.
_NOT_FOR_AN_ORBIT = ("EPHTEVT", "EPHDUR")


def a_priori_event(event):
    """The event geometry as :func:`lightledger.tasks.detrendmeta.fitted_event` gives it: not fitted."""
    return {name: {"value": float(event[name]), "error": None, "fitted": False}
            for name in ("t0", "a_rs", "inclination")}


def _finite(x):
    x = float(x)
    return x if math.isfinite(x) else None


def fitted_planet(row):
    """The white band's fitted planet from its PLANET row, JSON-ready (None = not measured)."""
    out = {}
    for name, err in (("rp_rs", "rp_rs_error"), ("eclipse_depth", "eclipse_depth_error"),
                      ("night_flux", "night_flux_error"), ("amplitude", "amplitude_error"),
                      ("offset_deg", "offset_error_deg")):
        out[name] = {"value": _finite(row[name]), "error": _finite(row[err])}
    out["amplitude"].update(error_lo=_finite(row["amplitude_error_lo"]),
                            error_hi=_finite(row["amplitude_error_hi"]))
    out["offset_deg"].update(error_lo=_finite(row["offset_error_lo_deg"]),
                             error_hi=_finite(row["offset_error_hi_deg"]))
    return out


def planet_cards(row):
    """FITS cards of the white band's fitted planet (see the module's table)."""
    cards = []
    for key, name, err, text in (
            ("PLRPRS", "rp_rs", "rp_rs_error", "radius ratio"),
            ("PLDAY", "eclipse_depth", "eclipse_depth_error", "day side Fp/Fs"),
            ("PLNIGHT", "night_flux", "night_flux_error", "night side Fp/Fs"),
            ("PLAMP", "amplitude", "amplitude_error", "peak-to-trough Fp/Fs"),
            ("PLOFFS", "offset_deg", "offset_error_deg", "[deg] hotspot offset")):
        value, error = _finite(row[name]), _finite(row[err])
        if name == "rp_rs" and error is None:
            cards.append((key, value, f"white {text}, a priori (no transit fitted)"))
            continue
        cards.append((key, value, f"white {text}"))
        cards.append((key + "E", error, f"1-sigma error of {key}"))
    for key, lo, hi in (("PLAMP", "amplitude_error_lo", "amplitude_error_hi"),
                        ("PLOFFS", "offset_error_lo_deg", "offset_error_hi_deg")):
        cards.append((key + "LO", _finite(row[lo]), f"{key} minus its 15.9th percentile"))
        cards.append((key + "HI", _finite(row[hi]), f"84.1st percentile minus {key}"))
    return cards


def phase_cards(target, event, times, exposure_time, n_channels):
    """Header cards of a phase-curve product: target, ephemeris, orbit, limb darkening, exposure.

    Parameters
    ----------
    target : dict
        ``name``, ``ra``, ``dec`` (deg, ICRS).
    event : dict
        The planet: ``t0``, ``period``, ``rp_rs``, ``a_rs``, ``inclination``,
        ``u1``, ``u2``, ``eccentricity``, ``omega``.
    times : array_like
        BJD_TDB of the exposures, d.
    exposure_time : array_like
        Exposure durations, s.
    n_channels : int

    Returns
    -------
    list of (keyword, value, comment)
    """
    event = dict(event, kind="phase-curve")
    texp = np.asarray(exposure_time, float)
    cards = [c for c in fits_cards(SimpleNamespace(target=target, event=event), times,
                                   texp if np.any(np.isfinite(texp)) else [0.0], n_channels)
             if c[0] not in _NOT_FOR_AN_ORBIT]
    k = [c[0] for c in cards].index("GEOIMPCT") + 1
    cards[k:k] = [("GEOECC", float(event.get("eccentricity") or 0.0), "orbital eccentricity"),
                  ("GEOOMEGA", float(event["omega"]) if event.get("omega") is not None else 90.0,
                   "[deg] argument of periastron")]
    return cards + event_cards(a_priori_event(event))


def phase_meta(target, event, times, exposure_time, channels, white_row, names):
    """The same facts for the ECSV copies' metadata (a JSON-ready dict).

    ``white_row`` is the white band's PLANET row; ``names`` the visits' names.
    """
    event = dict(event, kind="phase-curve")
    texp = np.asarray(exposure_time, float)
    meta = ecsv_meta(SimpleNamespace(target=target, event=event), times,
                     texp if np.any(np.isfinite(texp)) else [0.0], channels)
    meta["event"] = {"kind": "phase-curve", "t0_bjd_tdb": float(event["t0"]),
                     "period_d": float(event["period"]),
                     "meaning": "every transit and eclipse of the visits, and the planet's flux "
                                "over the whole orbit"}
    meta["geometry"]["eccentricity"] = float(event.get("eccentricity") or 0.0)
    meta["geometry"]["omega_deg"] = (float(event["omega"]) if event.get("omega") is not None
                                     else 90.0)
    meta["fitted_event"] = a_priori_event(event)
    meta["fitted_planet"] = fitted_planet(white_row)
    meta["visits"] = list(names)
    return meta


def coefficients_table(bands, fits, models):
    """COEFFICIENTS: one row per light curve, its fit's parameters and their covariance.

    Parameters
    ----------
    bands : sequence of (channel, wave_lo, wave_hi)
        White band first (channel -1).
    fits : sequence of JointFit
        Each light curve's (top-weighted) fit, in the order of ``bands``.
    models : sequence of str
        The systematics model of each fit.

    Returns
    -------
    astropy.table.Table
        Columns of :data:`~lightledger.tasks.phasecolumns.COEFFICIENT_COLUMNS`;
        ``values`` and ``covariance`` NaN-padded to the longest list.
    """
    rows = []
    for (j, lo, hi), jf, model in zip(bands, fits, models):
        names = tuple(jf.parameter_names)
        values = [float(x) for v, act in zip(jf.visits, _active(jf))
                  for x in np.asarray(v.coefficients, float)[act]]
        values += [float(x) for x in jf.planet] if jf.fitted_planet else []
        values += [float(jf.rp_rs)] if jf.fitted_radius else []
        shapes = ", ".join(f"{k + 1}:{name}={value:.6g}" for k, v in enumerate(jf.visits)
                           for name, value in v.shapes)
        rows.append((j, lo, hi, model, names, np.asarray(values, float),
                     np.asarray(jf.covariance, float), float(jf.error_scale), shapes))
    return padded_coefficients(rows, COEFFICIENT_COLUMNS)


def _active(jf):
    """Per visit, which of its coefficient names were fitted (from ``parameter_names``)."""
    fitted = set(jf.parameter_names)
    return [np.array([f"{k + 1}:{name}" in fitted for name in v.coefficient_names])
            for k, v in enumerate(jf.visits)]
