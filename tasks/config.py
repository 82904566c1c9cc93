"""The instrument profile and the visit description: TOML, validated at load.

Both documents are checked against the schemas below before anything runs: a
missing file, a TOML syntax error, a missing key, a value of the wrong type or
an unknown key is one :class:`~lightledger.pipeline.errors.ConfigError` whose
message names the file and the key (and, for an unknown key, the nearest valid
one).  Paths inside either document are relative to the document itself.

Every key, its type and meaning is listed in the schemas ``PROFILE_SCHEMA``
and ``VISIT_SCHEMA``; the README's "Instrument profile" and "Visit
description" sections are generated from the same text.
"""

import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

from lightledger.pipeline.errors import ConfigError, ParameterError
from lightledger.pipeline.parameters import STAGE_ORDER, nearest, resolve

__all__ = ["Key", "PROFILE_SCHEMA", "VISIT_SCHEMA", "RAW_KEYWORDS", "RAW_EXTENSIONS",
           "Profile", "Visit", "load_profile", "load_visit"]

#: Header keywords of the raw layout that a profile may rename.
RAW_KEYWORDS = ("DATE-BEG", "TIMESYS", "XPOSURE", "OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z",
                "SCANVEL", "SUBORIGX", "SUBORIGY", "INSTPROF")
#: Extensions of the raw layout that a profile may rename.
RAW_EXTENSIONS = ("READS", "READTIME", "STARTOFF")


@dataclass(frozen=True)
class Key:
    """One key of a TOML schema: its type, whether required, its meaning."""

    kind: str           # "str", "float", "int", "path", "floats", "ints", "map"
    doc: str
    required: bool = True
    length: int | None = None
    choices: tuple = ()
    allowed_keys: tuple = ()   # for "map": the keys it may hold


PROFILE_SCHEMA = {
    "name": Key("str", "free-text name of the instrument profile", required=False),
    "detector": {
        "gain": Key("float", "electrons per ADU"),
        "read_noise": Key("float", "read noise, electrons per read"),
        "saturation": Key("float", "saturation level, ADU above bias"),
        "full_shape": Key("ints", "[rows, columns] of the full detector", length=2),
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
                                          "normalised wavelength", length=2, required=False),
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
        "width": Key("float", "Gaussian sigma of the cross-dispersion profile, rows"),
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
    },
    "target": {
        "name": Key("str", "name of the target (free text)", required=False),
        "ra": Key("float", "right ascension, degrees (ICRS)"),
        "dec": Key("float", "declination, degrees (ICRS)"),
        "teff": Key("float", "stellar effective temperature, K (model spectrum)"),
        "source_x": Key("float", "full-detector column of the source's direct-image position"),
        "source_y": Key("float", "full-detector row of the source's direct-image position"),
    },
    "event": {
        "kind": Key("str", "'transit' or 'eclipse'", choices=("transit", "eclipse")),
        "t0": Key("float", "BJD_TDB of mid-transit (eclipse at t0 + period/2)"),
        "period": Key("float", "orbital period, days"),
        "duration": Key("float", "first to fourth contact of the observed event, days"),
        "rp_rs": Key("float", "a priori planet-to-star radius ratio"),
        "a_rs": Key("float", "a priori semi-major axis in stellar radii"),
        "inclination": Key("float", "orbital inclination, degrees"),
        "u1": Key("float", "quadratic limb-darkening coefficient u1", required=False),
        "u2": Key("float", "quadratic limb-darkening coefficient u2", required=False),
    },
    "stages": Key("map", "per-stage settings: tables [stages.calibrate], [stages.extract], "
                         "[stages.bin], [stages.detrend]", required=False,
                  allowed_keys=STAGE_ORDER),
}


def _read_toml(path, what):
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"{path}: {what} not found")
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read {what} ({exc.strerror})") from None


def _check(doc, schema, path, prefix=""):
    """Validate ``doc`` against ``schema``; return a converted copy."""
    out = {}
    for key in doc:
        if key not in schema:
            hint = nearest(key, schema)
            hint = f" (did you mean {prefix}{hint}?)" if hint else ""
            raise ConfigError(f"{path}: unknown key {prefix}{key}{hint}")
    for key, rule in schema.items():
        name = prefix + key
        if isinstance(rule, dict):
            if key not in doc:
                if any(r.required for r in rule.values() if isinstance(r, Key)):
                    raise ConfigError(f"{path}: missing table [{name}]")
                out[key] = _check({}, rule, path, name + ".")
                continue
            if not isinstance(doc[key], dict):
                raise ConfigError(f"{path}: {name} must be a table [{name}]")
            out[key] = _check(doc[key], rule, path, name + ".")
            continue
        if key not in doc:
            if rule.required:
                raise ConfigError(f"{path}: missing key {name} ({rule.doc})")
            out[key] = {} if rule.kind == "map" else None
            continue
        out[key] = _convert(doc[key], rule, path, name)
    return out


def _convert(value, rule, path, name):
    bad = f"{path}: {name} must be "
    if rule.kind == "str":
        if not isinstance(value, str):
            raise ConfigError(bad + f"a string, not {value!r}")
        if rule.choices and value not in rule.choices:
            raise ConfigError(bad + f"one of {', '.join(rule.choices)}, not {value!r}")
        return value
    if rule.kind == "path":
        if not isinstance(value, str) or not value:
            raise ConfigError(bad + f"a path string, not {value!r}")
        return (Path(path).parent / value).resolve()
    if rule.kind == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise ConfigError(bad + f"a finite number, not {value!r}")
        return float(value)
    if rule.kind in ("floats", "ints"):
        number = int if rule.kind == "ints" else (int, float)
        if (not isinstance(value, list)
                or any(isinstance(v, bool) or not isinstance(v, number) for v in value)):
            what = "whole numbers" if rule.kind == "ints" else "numbers"
            raise ConfigError(bad + f"a list of {what}, not {value!r}")
        if rule.length is not None and len(value) != rule.length:
            raise ConfigError(bad + f"a list of {rule.length} numbers, got {len(value)}")
        return tuple(int(v) if rule.kind == "ints" else float(v) for v in value)
    if rule.kind == "map":
        if not isinstance(value, dict):
            raise ConfigError(bad + "a table")
        for k in value:
            if k not in rule.allowed_keys:
                hint = nearest(k, rule.allowed_keys)
                hint = f" (did you mean {name}.{hint}?)" if hint else ""
                raise ConfigError(f"{path}: unknown key {name}.{k}{hint}")
        return dict(value)
    raise AssertionError(rule.kind)


@dataclass(frozen=True)
class Profile:
    """A validated instrument profile."""

    path: Path
    name: str
    gain: float
    read_noise: float
    saturation: float
    full_shape: tuple
    files: dict             # reference-file role -> absolute Path (or None)
    flat_range: tuple | None
    dispersion: tuple
    column_offset: float
    row_offset: float
    tilt: float
    width: float
    keywords: dict          # our keyword -> keyword in the files
    extensions: dict        # our extension -> EXTNAME in the files

    def keyword(self, ours):
        return self.keywords.get(ours, ours)

    def extension(self, ours):
        return self.extensions.get(ours, ours)


@dataclass(frozen=True)
class Visit:
    """A validated visit description."""

    path: Path
    name: str
    raw: Path
    profile: Profile
    notebook: Path
    target: dict
    event: dict
    stages: dict            # stage -> dict of every parameter (defaults filled in)
    overrides: dict         # stage -> dict of the keys the description itself set


def load_profile(path):
    """Read and validate an instrument profile.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Profile

    Raises
    ------
    ConfigError
        Naming the file and the key for any problem.
    """
    path = Path(path).resolve()
    doc = _check(_read_toml(path, "instrument profile"), PROFILE_SCHEMA, path)
    det, disp, trace = doc["detector"], doc["dispersion"], doc["trace"]
    for key in ("gain", "read_noise", "saturation"):
        if det[key] <= 0:
            raise ConfigError(f"{path}: detector.{key} must be positive, got {det[key]}")
    for role, file in doc["reference_files"].items():
        if file is not None and not file.is_file():
            raise ConfigError(f"{path}: reference_files.{role} names {file}, which does not exist")
    return Profile(path=path, name=doc["name"] or path.stem, gain=det["gain"],
                   read_noise=det["read_noise"], saturation=det["saturation"],
                   full_shape=det["full_shape"], files=doc["reference_files"],
                   flat_range=doc["flat"]["wavelength_range"],
                   dispersion=disp["coefficients"], column_offset=disp["column_offset"],
                   row_offset=trace["row_offset"], tilt=trace["tilt"], width=trace["width"],
                   keywords=doc["keywords"], extensions=doc["extensions"])


def load_visit(path, settings=None):
    """Read and validate a visit description and the profile it names.

    Parameters
    ----------
    path : str or Path
    settings : list of (stage, key, value), optional
        Command-line overrides, applied after the description's own
        ``[stages.*]`` tables (already parsed by
        :func:`lightledger.pipeline.parameters.parse_assignment`).

    Returns
    -------
    Visit
    """
    path = Path(path).resolve()
    doc = _check(_read_toml(path, "visit description"), VISIT_SCHEMA, path)
    visit = doc["visit"]
    if not visit["raw"].is_dir():
        raise ConfigError(f"{path}: visit.raw names {visit['raw']}, which is not a directory")
    profile = load_profile(visit["profile"])
    event = dict(doc["event"])
    event["u1"] = 0.0 if event["u1"] is None else event["u1"]
    event["u2"] = 0.0 if event["u2"] is None else event["u2"]
    for key in ("period", "duration", "rp_rs", "a_rs"):
        if event[key] <= 0:
            raise ConfigError(f"{path}: event.{key} must be positive, got {event[key]}")
    overrides = {}
    for stage, table in doc["stages"].items():
        if not isinstance(table, dict):
            raise ConfigError(f"{path}: stages.{stage} must be a table [stages.{stage}]")
        overrides[stage] = dict(table)
    for stage, key, value in settings or ():
        overrides.setdefault(stage, {})[key] = value
    stages = {}
    for stage in STAGE_ORDER:
        try:
            stages[stage] = resolve(stage, overrides.get(stage), where=str(path))
        except ParameterError as exc:
            raise ConfigError(str(exc)) from None
    notebook = visit["notebook"] or path.parent / "notebook"
    return Visit(path=path, name=visit["name"], raw=visit["raw"], profile=profile,
                 notebook=notebook, target=doc["target"], event=event, stages=stages,
                 overrides=overrides)
