"""What a fitter needs to know about a light-curve product, written into the product.

A light curve is only usable by a transit or eclipse fitter with the facts
behind it: the target and its coordinates, the ephemeris, orbit geometry and
limb darkening the reduction assumed, how long each exposure collected light,
which wavelengths each channel holds and in which time scale each time column
is.  :func:`fits_cards` gives them as FITS header cards (for the table HDUs of
the light-curve and detrended products) and :func:`ecsv_meta` as the same
facts for an ECSV table's metadata, so that a fitter reads them with astropy
alone and never opens the visit description.

Keywords (the FITS standard's OBJECT, RADESYS and XPOSURE; the rest our own):

========  ===========================================================
OBJECT    target name
OBJRA     target right ascension, deg (ICRS, RADESYS)
OBJDEC    target declination, deg
EVENT     'transit' or 'eclipse'
EPHT0     BJD_TDB of mid-transit, d
EPHPER    orbital period, d
EPHTEVT   BJD_TDB of the centre of the observed event (a transit at
          EPHT0 + k EPHPER, an eclipse half a period later), d
EPHDUR    first-to-fourth-contact duration of the observed event, d
GEORPRS   planet-to-star radius ratio assumed (a priori)
GEOARS    semi-major axis in stellar radii
GEOINCL   orbital inclination, deg
GEOIMPCT  impact parameter a/rs cos(i)
LDLAW     limb-darkening law ('quadratic': I(mu) = 1 - u1 (1 - mu)
          - u2 (1 - mu)^2)
LDU1      u1
LDU2      u2
XPOSURE   median exposure duration, s (each exposure's own in the
          ``exposure_time`` column)
NCHAN     number of channels (their edges in the CHANNELS table)
========  ===========================================================

Time columns: ``time_bjd_tdb`` carries the FITS Standard 4.0 time-column
keywords TCTYPn = 'TDB' and TRPOSn = 'BARYCENTER' with JDREF = 0 (values are
Julian dates), so astropy's ``Table.read(..., astropy_native=True)`` turns it
into a Time column in the right scale.  A table can carry one reference date
only, so the MJD column ``time_mjd_utc`` states its scale (UTC, at the
observer) in its description; the ECSV metadata ``time_columns`` names the
scale, format and reference position of both.
"""

import math

import numpy as np

__all__ = ["fits_cards", "ecsv_meta", "event_centre", "set_time_keywords", "channel_text",
           "TIME_COLUMNS"]

#: Scale, format and reference position of each time column of the products.
TIME_COLUMNS = {
    "time_bjd_tdb": {"scale": "tdb", "format": "jd", "reference_position": "barycentre",
                     "meaning": "mid-exposure time, barycentric Julian date in TDB (BJD_TDB)"},
    "time_mjd_utc": {"scale": "utc", "format": "mjd", "reference_position": "observer",
                     "meaning": "mid-exposure time, modified Julian date in UTC at the observer"},
}


def event_centre(event, times):
    """BJD_TDB of the observed event's centre nearest the middle of ``times`` (days)."""
    t = np.asarray(times, float)
    t = t[np.isfinite(t)]
    middle = 0.5 * (t.min() + t.max()) if t.size else event["t0"]
    first = event["t0"] + (0.5 * event["period"] if event["kind"] == "eclipse" else 0.0)
    k = round((middle - first) / event["period"])
    return float(first + k * event["period"])


def _impact(event):
    return float(event["a_rs"] * abs(math.cos(math.radians(event["inclination"]))))


def fits_cards(visit, times, exposure_time, n_channels):
    """Header cards with the target, ephemeris, geometry, limb darkening and exposure duration.

    Parameters
    ----------
    visit : config.Visit
    times : array_like
        BJD_TDB of the exposures, d (for the observed event's centre).
    exposure_time : array_like
        Exposure durations, s.
    n_channels : int

    Returns
    -------
    list of (keyword, value, comment)
    """
    target, event = visit.target, visit.event
    xposure = float(np.nanmedian(np.asarray(exposure_time, float)))
    return [
        ("OBJECT", (target.get("name") or "")[:68], "target name"),
        ("OBJRA", float(target["ra"]), "[deg] target right ascension"),
        ("OBJDEC", float(target["dec"]), "[deg] target declination"),
        ("RADESYS", "ICRS", "frame of OBJRA, OBJDEC"),
        ("EVENT", event["kind"], "observed event"),
        ("EPHT0", float(event["t0"]), "[d] BJD_TDB of mid-transit"),
        ("EPHPER", float(event["period"]), "[d] orbital period"),
        ("EPHTEVT", event_centre(event, times), "[d] BJD_TDB of the observed event's centre"),
        ("EPHDUR", float(event["duration"]) if event.get("duration") is not None else None,
         "[d] first to fourth contact"),
        ("GEORPRS", float(event["rp_rs"]), "planet-to-star radius ratio (a priori)"),
        ("GEOARS", float(event["a_rs"]), "semi-major axis / stellar radius"),
        ("GEOINCL", float(event["inclination"]), "[deg] orbital inclination"),
        ("GEOIMPCT", _impact(event), "impact parameter a/rs cos(i)"),
        ("LDLAW", "quadratic", "I(mu) = 1 - u1 (1-mu) - u2 (1-mu)^2"),
        ("LDU1", float(event["u1"]), "limb-darkening coefficient u1"),
        ("LDU2", float(event["u2"]), "limb-darkening coefficient u2"),
        ("XPOSURE", xposure, "[s] median exposure duration"),
        ("NCHAN", int(n_channels), "channels (edges in the CHANNELS table)"),
    ]


def ecsv_meta(visit, times, exposure_time, channels):
    """The same facts for an ECSV table's metadata (a dict, JSON-ready).

    ``channels`` is the CHANNELS table (``channel``, ``wave_lo``,
    ``wave_hi``, ``wave_mid``); ``None`` leaves the channels out.
    """
    target, event = visit.target, visit.event
    meta = {
        "target": {"name": target.get("name") or "", "ra_deg": float(target["ra"]),
                   "dec_deg": float(target["dec"]), "frame": "icrs"},
        "event": {"kind": event["kind"], "t0_bjd_tdb": float(event["t0"]),
                  "period_d": float(event["period"]),
                  "event_centre_bjd_tdb": event_centre(event, times),
                  "duration_d": None if event.get("duration") is None else float(event["duration"])},
        "geometry": {"rp_rs": float(event["rp_rs"]), "a_rs": float(event["a_rs"]),
                     "inclination_deg": float(event["inclination"]),
                     "impact_parameter": _impact(event)},
        "limb_darkening": {"law": "quadratic", "u1": float(event["u1"]), "u2": float(event["u2"])},
        "exposure_time_s": float(np.nanmedian(np.asarray(exposure_time, float))),
        "time_columns": {k: dict(v) for k, v in TIME_COLUMNS.items()},
    }
    if channels is not None:
        meta["channels"] = [{"channel": int(c["channel"]), "wave_lo_um": float(c["wave_lo"]),
                             "wave_hi_um": float(c["wave_hi"]), "wave_mid_um": float(c["wave_mid"])}
                            for c in channels]
    return meta


def set_time_keywords(hdu):
    """Add the FITS time-column keywords of ``time_bjd_tdb`` to a table HDU (see the module)."""
    names = [n.lower() for n in hdu.columns.names]
    if "time_bjd_tdb" not in names:
        return hdu
    n = names.index("time_bjd_tdb") + 1
    hdu.header[f"TCTYP{n}"] = ("TDB", "time scale of column time_bjd_tdb")
    hdu.header[f"TRPOS{n}"] = ("BARYCENTER", "reference position of time_bjd_tdb")
    hdu.header["JDREF"] = (0.0, "[d] time columns hold Julian dates")
    hdu.header["TIMEUNIT"] = ("d", "unit of the time columns")
    return hdu


def channel_text(channels, j):
    """``"channel J, LO-HI um"`` for column descriptions."""
    return (f"channel {j}, {float(channels['wave_lo'][j]):.4f}-{float(channels['wave_hi'][j]):.4f} um")
