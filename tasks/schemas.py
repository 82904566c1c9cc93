"""The schemas of the instrument profile and the visit description: every key, its type and meaning.

:class:`Key` declares one key (type, whether required, meaning, range);
``PROFILE_SCHEMA`` and ``VISIT_SCHEMA`` nest them by TOML table.  The
README's "Instrument profile" and "Visit description" sections document the
same keys (tests/test_docs.py compares them).  Checked by
:func:`.tomlcheck.check_schema`, loaded by :mod:`.config`.
"""

from dataclasses import dataclass

from lightledger.pipeline.parameters import STAGE_ORDER

__all__ = ["Key", "PROFILE_SCHEMA", "VISIT_SCHEMA", "RAW_KEYWORDS", "RAW_EXTENSIONS",
           "EXCLUDE_KINDS"]


#: Header keywords of the raw layout that a profile may rename.
RAW_KEYWORDS = ("DATE-BEG", "TIMESYS", "XPOSURE", "OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z",
                "SCANVEL", "SUBORIGX", "SUBORIGY", "INSTPROF")


#: Extensions of the raw layout that a profile may rename.
RAW_EXTENSIONS = ("READS", "READTIME", "STARTOFF")


#: Lists of the visit description's ``[exclude]`` table.
EXCLUDE_KINDS = ("files", "exposures", "times", "channels")


@dataclass(frozen=True)
class Key:
    """One key of a TOML schema: its type, whether required, its meaning and range."""

    kind: str           # "str", "float", "int", "path", "floats", "ints", "map", "exclude"
    doc: str
    required: bool = True
    length: int | None = None
    choices: tuple = ()
    allowed_keys: tuple = ()   # for "map": the keys it may hold
    positive: bool = False     # numbers must be > 0
    bounds: tuple | None = None  # inclusive (low, high) of a number
    default: object = None


PROFILE_SCHEMA = {
    "name": Key("str", "free-text name of the instrument profile", required=False),
    "detector": {
        "gain": Key("float", "electrons per ADU", positive=True),
        "read_noise": Key("float", "read noise, electrons per read", positive=True),
        "saturation": Key("float", "saturation level, ADU above bias", positive=True),
        "full_shape": Key("ints", "[rows, columns] of the full detector", length=2, positive=True),
    },
    "reference_files": {
        "bias": Key("path", "2-D reset level in ADU"),
        "dark": Key("path", "2-D dark rate in electrons per second"),
        "flat": Key("path", "2-D flat (mean 1) or 3-D cube of polynomial coefficients in "
                            "normalised wavelength"),
        "nonlinearity": Key("path", "3-D cube C: linear = e (1 + sum_k C[k-1] e^k)"),
        "bad_pixels": Key("path", "2-D integer, nonzero = unusable"),
        "throughput": Key("path", "ECSV table with columns wavelength [um] and throughput",
                          required=False),
    },
    "flat": {
        "wavelength_range": Key("floats", "[min, max] micrometres of the flat cube's "
                                          "normalised wavelength", length=2, required=False,
                                positive=True),
    },
    "dispersion": {
        "coefficients": Key("floats", "wavelength (um) = sum_k c_k (x - x_ref)^k, x in "
                                      "full-detector columns"),
        "column_offset": Key("float", "x_ref = source_x + column_offset (columns)"),
    },
    "trace": {
        "row_offset": Key("float", "trace row at x_ref = source_y + row_offset "
                                   "(for a scan: the row where the scan starts)"),
        "tilt": Key("float", "rows per column (dy/dx) of the trace"),
        "width": Key("float", "Gaussian sigma of the cross-dispersion profile, rows", positive=True),
    },
    "keywords": Key("map", "our raw keyword -> the keyword in these files",
                    required=False, allowed_keys=RAW_KEYWORDS),
    "extensions": Key("map", "our raw extension -> the EXTNAME in these files",
                      required=False, allowed_keys=RAW_EXTENSIONS),
}
VISIT_SCHEMA = {
    "visit": {
        "name": Key("str", "name of the visit (free text)"),
        "raw": Key("path", "directory of raw FITS files"),
        "profile": Key("path", "instrument profile (TOML)"),
        "notebook": Key("path", "directory where the notebook of products is written",
                        required=False),
        "on_bad_exposure": Key("str", "an exposure that cannot be used: 'exclude' = set it aside "
                                      "with its reason and go on, 'stop' = report it as an error",
                               required=False, choices=("exclude", "stop"), default="exclude"),
    },
    "target": {
        "name": Key("str", "name of the target (free text)", required=False),
        "ra": Key("float", "right ascension, degrees (ICRS)", bounds=(0.0, 360.0)),
        "dec": Key("float", "declination, degrees (ICRS)", bounds=(-90.0, 90.0)),
        "teff": Key("float", "stellar effective temperature, K (model spectrum)", positive=True),
        "source_x": Key("float", "full-detector column of the source's direct-image position"),
        "source_y": Key("float", "full-detector row of the source's direct-image position"),
    },
    "event": {
        "kind": Key("str", "'transit', 'eclipse' or 'phase-curve' (every transit and eclipse "
                           "in the visit, with the planet's flux over the orbit)",
                    choices=("transit", "eclipse", "phase-curve")),
        "t0": Key("float", "BJD_TDB of mid-transit (eclipse at t0 + period/2 on a circular orbit)"),
        "period": Key("float", "orbital period, days", positive=True),
        "duration": Key("float", "first to fourth contact of the observed event, days",
                        positive=True),
        "rp_rs": Key("float", "a priori planet-to-star radius ratio", positive=True),
        "a_rs": Key("float", "a priori semi-major axis in stellar radii", positive=True),
        "inclination": Key("float", "orbital inclination, degrees", bounds=(0.0, 180.0)),
        "u1": Key("float", "quadratic limb-darkening coefficient u1", required=False, default=0.0),
        "u2": Key("float", "quadratic limb-darkening coefficient u2", required=False, default=0.0),
        "eccentricity": Key("float", "orbital eccentricity", required=False, default=0.0,
                            bounds=(0.0, 0.95)),
        "omega": Key("float", "argument of periastron, degrees", required=False, default=90.0,
                     bounds=(-360.0, 360.0)),
        "ld_wavelength": Key("floats", "wavelengths (um, increasing) of a limb-darkening table "
                                       "for the channels (detrend.limb_darkening = 'table')",
                             required=False, positive=True),
        "ld_u1": Key("floats", "u1 at each ld_wavelength", required=False),
        "ld_u2": Key("floats", "u2 at each ld_wavelength", required=False),
    },
    "exclude": {
        "files": Key("exclude", "raw files to leave out: names, or {file = NAME, reason = TEXT}",
                     required=False),
        "exposures": Key("exclude", "exposure numbers (start-time order, from 0) to leave out: "
                                    "N, {exposure = N, reason = TEXT} or "
                                    "{first = N, last = M, reason = TEXT}", required=False),
        "times": Key("exclude", "time ranges to leave out: {from = T, to = T, reason = TEXT}, "
                                "T an ISO-8601 UTC time or an MJD (UTC); an exposure overlapping "
                                "a range is left out", required=False),
        "channels": Key("exclude", "wavelength channels (numbers of the bin stage, from 0) to "
                                   "leave out of the detrending: N, {channel = N, reason = TEXT} "
                                   "or {first = N, last = M, reason = TEXT}", required=False),
    },
    "stages": Key("map", "per-stage settings: tables [stages.calibrate], [stages.extract], "
                         "[stages.bin], [stages.detrend]", required=False,
                  allowed_keys=STAGE_ORDER),
}
