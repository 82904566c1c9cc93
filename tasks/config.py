"""The instrument profile and the visit description: TOML, validated at load.

Both documents are checked against the schemas below before anything runs: a
missing file, a file that is not UTF-8, a TOML syntax error, a missing key, a
value of the wrong type or outside its physical range, or an unknown key is
one problem whose line names the file and the key (and, for an unknown key,
the nearest valid one).  Paths inside either document are relative to the
document itself.

The loaders collect every problem of a document: given a
:class:`~lightledger.tasks.problems.Problems` list they add to it and return
what they could read (fields that failed are None), so the validation pass
(:mod:`lightledger.tasks.check`) reports everything at once; without one they
raise a single :class:`~lightledger.pipeline.errors.ConfigError` holding every
problem, one per line.

Every key, its type and meaning is listed in the schemas ``PROFILE_SCHEMA``
and ``VISIT_SCHEMA``; the README's "Instrument profile" and "Visit
description" sections document the same keys.
"""

import datetime as _dt
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from lightledger.pipeline.errors import ConfigError, ParameterError
from lightledger.pipeline.parameters import STAGE_ORDER, nearest, resolve

from .problems import Problems

__all__ = ["Key", "PROFILE_SCHEMA", "VISIT_SCHEMA", "RAW_KEYWORDS", "RAW_EXTENSIONS",
           "EXCLUDE_KINDS", "Profile", "Visit", "load_profile", "load_visit", "fits_text",
           "read_toml", "check_schema"]

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

_FITS_KEYWORD = re.compile(r"^[A-Z0-9_-]{1,8}$")


_PUNCTUATION = {"\u2010": "-", "\u2011": "-", "\u2012": "-", "\u2013": "-", "\u2014": "-",
                "\u2212": "-", "\u2018": "'", "\u2019": "'", "\u201c": '"', "\u201d": '"',
                "\u2026": "...", "\u00b7": "."}


def fits_text(text, limit=None, *, reversible=False):
    """``text`` as printable ASCII for a FITS header card or table (FITS Standard 4.0, 4.2.1).

    Letters with accents lose them (é -> e), tabs and other white space become
    spaces, and every other character outside printable ASCII is written as
    ``\\uXXXX``.  With ``reversible`` every character outside printable ASCII
    is written as its Python escape (``\\xe9``, ``\\u2013``), which
    ``codecs.decode(text, "unicode_escape")`` undoes (for paths recorded in
    PROVENANCE tables).  The original text is kept unchanged in JSON and
    ECSV products, which are UTF-8.
    """
    import unicodedata

    if reversible:
        result = str(text).encode("ascii", "backslashreplace").decode("ascii")
        result = "".join(c if " " <= c <= "~" else c.encode("unicode_escape").decode("ascii")
                         for c in result)
        return result[:limit] if limit else result
    out = []
    for ch in str(text):
        if " " <= ch <= "~":
            out.append(ch)
        elif ch.isspace():
            out.append(" ")
        elif ch in _PUNCTUATION:
            out.append(_PUNCTUATION[ch])
        else:
            base = unicodedata.normalize("NFKD", ch).encode("ascii", "ignore").decode()
            base = "".join(c for c in base if " " <= c <= "~")
            out.append(base if base else f"\\u{ord(ch):04x}" if ord(ch) < 0x10000
                       else f"\\U{ord(ch):08x}")
    result = "".join(out)
    return result[:limit] if limit else result


def read_toml(path, what, problems):
    """The parsed document, or None after adding the reason to ``problems``."""
    path = Path(path)
    if not path.exists():
        problems.error(path, f"{what} not found")
        return None
    if path.is_dir():
        problems.error(path, f"{what} is a directory, not a TOML file")
        return None
    try:
        data = path.read_bytes()
    except OSError as exc:
        problems.error(path, f"cannot read the {what} ({exc.strerror or exc})")
        return None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        problems.error(path, f"not UTF-8 text: byte 0x{data[exc.start]:02x} on line {line} "
                             f"(TOML files are UTF-8; save the file as UTF-8)")
        return None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        problems.error(path, f"not valid TOML ({exc})")
        return None
    except RecursionError:
        problems.error(path, "not valid TOML (nested too deeply)")
        return None


def check_schema(doc, schema, path, problems, prefix=""):
    """Validate ``doc`` against ``schema``; a converted copy, None where a value failed.

    Every problem is added to ``problems`` (one line naming ``path`` and the key).
    """
    out = {}
    suggested = set()
    for key in doc:
        if key not in schema:
            hint = nearest(key, schema)
            suggested.add(hint)
            hint = f" (did you mean {prefix}{hint}?)" if hint else ""
            problems.error(path, f"unknown key {prefix}{key}{hint}")
    for key, rule in schema.items():
        name = prefix + key
        if isinstance(rule, dict):
            if key not in doc:
                if any(r.required for r in rule.values() if isinstance(r, Key)) \
                        and key not in suggested:
                    problems.error(path, f"missing table [{name}]")
                out[key] = _check({}, rule, path, Problems(), name + ".")
                continue
            if not isinstance(doc[key], dict):
                problems.error(path, f"{name} must be a table [{name}]")
                out[key] = _check({}, rule, path, Problems(), name + ".")
                continue
            out[key] = _check(doc[key], rule, path, problems, name + ".")
            continue
        if key not in doc:
            if rule.required and key not in suggested:   # a misspelt key is reported once
                problems.error(path, f"missing key {name} ({rule.doc})")
            out[key] = {} if rule.kind == "map" else () if rule.kind == "exclude" else rule.default
            continue
        try:
            out[key] = _convert(doc[key], rule, path, name)
        except ConfigError as exc:
            problems.error(path, str(exc))
            out[key] = None
    return out


_check = check_schema


def _number(value, name, rule, integer=False):
    what = "a whole number" if integer else "a finite number"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ConfigError(f"{name} must be {what}, not {_show(value)}")
    if integer and not isinstance(value, int):
        raise ConfigError(f"{name} must be {what}, not {_show(value)}")
    if isinstance(value, float) and not math.isfinite(value):
        raise ConfigError(f"{name} must be {what}, not {_show(value)}")
    if rule.positive and value <= 0:
        raise ConfigError(f"{name} must be positive, got {_show(value)}")
    if rule.bounds is not None and not rule.bounds[0] <= value <= rule.bounds[1]:
        raise ConfigError(f"{name} must lie in [{rule.bounds[0]:g}, {rule.bounds[1]:g}], "
                          f"got {_show(value)}")
    if integer:
        return int(value)
    try:
        return float(value)
    except OverflowError:
        raise ConfigError(f"{name} must be {what}, not {_show(value)}") from None


def _show(value):
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _convert(value, rule, path, name):
    if rule.kind == "str":
        if not isinstance(value, str):
            raise ConfigError(f"{name} must be a string, not {_show(value)}")
        if rule.choices and value not in rule.choices:
            raise ConfigError(f"{name} must be one of {', '.join(rule.choices)}, not {_show(value)}")
        return value
    if rule.kind == "path":
        if not isinstance(value, str) or not value or "\x00" in value:
            raise ConfigError(f"{name} must be a path string, not {_show(value)}")
        try:
            return (Path(path).parent / value).resolve()
        except (OSError, RuntimeError, ValueError) as exc:
            raise ConfigError(f"{name} is not a usable path ({exc})") from None
    if rule.kind == "float":
        return _number(value, name, rule)
    if rule.kind in ("floats", "ints"):
        what = "whole numbers" if rule.kind == "ints" else "finite numbers"
        if not isinstance(value, list):
            raise ConfigError(f"{name} must be a list of {what}, not {_show(value)}")
        if rule.length is not None and len(value) != rule.length:
            raise ConfigError(f"{name} must be a list of {rule.length} numbers, got {len(value)}")
        if not value:
            raise ConfigError(f"{name} must be a non-empty list of {what}")
        out = []
        for k, v in enumerate(value):
            try:
                out.append(_number(v, f"{name}[{k}]", rule, integer=rule.kind == "ints"))
            except ConfigError:
                raise ConfigError(f"{name} must be a list of {what}"
                                  f"{' > 0' if rule.positive else ''}, not {_show(value)}") from None
        return tuple(out)
    if rule.kind == "map":
        if not isinstance(value, dict):
            raise ConfigError(f"{name} must be a table [{name}]")
        unknown = []
        for k in value:
            if k not in rule.allowed_keys:
                hint = nearest(k, rule.allowed_keys)
                unknown.append(f"unknown key {name}.{k}"
                               + (f" (did you mean {name}.{hint}?)" if hint else ""))
        if unknown:
            raise ConfigError("; ".join(unknown))
        return dict(value)
    if rule.kind == "exclude":
        return _exclusions(value, name)
    raise AssertionError(rule.kind)


# -- [exclude] lists ---------------------------------------------------------------------------

_ITEM_KEYS = {"files": ("file", "reason"), "exposures": ("exposure", "first", "last", "reason"),
              "times": ("from", "to", "reason"), "channels": ("channel", "first", "last", "reason")}


def _exclusions(value, name):
    kind = name.rsplit(".", 1)[-1]
    if not isinstance(value, list):
        raise ConfigError(f"{name} must be a list, e.g. {name.rsplit('.', 1)[-1]} = [...]")
    items = []
    for k, item in enumerate(value):
        label = f"{name}[{k}]"
        reason = ""
        if isinstance(item, dict):
            for key in item:
                if key not in _ITEM_KEYS[kind]:
                    hint = nearest(key, _ITEM_KEYS[kind])
                    hint = f" (did you mean {hint}?)" if hint else ""
                    raise ConfigError(f"unknown key {key!r} in {label}{hint}")
            reason = item.get("reason", "")
            if not isinstance(reason, str):
                raise ConfigError(f"{label}.reason must be a string, not {_show(reason)}")
        if kind == "files":
            file = item.get("file") if isinstance(item, dict) else item
            if not isinstance(file, str) or not file or "/" in file or "\x00" in file:
                raise ConfigError(f"{label} must be a file name in the raw directory (or "
                                  f"{{file = NAME, reason = TEXT}}), not {_show(item)}")
            items.append((file, reason))
        elif kind == "times":
            if not isinstance(item, dict) or "from" not in item or "to" not in item:
                raise ConfigError(f"{label} must be a table {{from = T, to = T, reason = TEXT}}, "
                                  f"not {_show(item)}")
            lo, hi = (_mjd(item[k], f"{label}.{k}") for k in ("from", "to"))
            if not hi > lo:
                raise ConfigError(f"{label}: 'to' must be later than 'from'")
            items.append((lo, hi, reason))
        else:
            single = kind[:-1]
            if isinstance(item, dict):
                if single in item:
                    if "first" in item or "last" in item:
                        raise ConfigError(f"{label} gives both {single} and first/last")
                    first = last = item[single]
                elif "first" in item and "last" in item:
                    first, last = item["first"], item["last"]
                else:
                    raise ConfigError(f"{label} must give {single} = N, or first = N and last = M")
            else:
                first = last = item
            for v in (first, last):
                if isinstance(v, bool) or not isinstance(v, int) or v < 0:
                    raise ConfigError(f"{label} must hold whole numbers >= 0 ({kind} count from "
                                      f"0), not {_show(item)}")
            if last < first:
                raise ConfigError(f"{label}: last ({last}) comes before first ({first})")
            items.append((int(first), int(last), reason))
    return tuple(items)


def _mjd(value, name):
    """MJD (UTC) of an ISO-8601 UTC string, a TOML date-time, or a number taken as MJD."""
    from astropy.time import Time

    if isinstance(value, bool):
        raise ConfigError(f"{name} must be an ISO-8601 UTC time or an MJD, not {_show(value)}")
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            raise ConfigError(f"{name} must be a finite MJD, not {_show(value)}")
        return float(value)
    if isinstance(value, _dt.datetime):
        if value.tzinfo is not None:
            value = value.astimezone(_dt.timezone.utc).replace(tzinfo=None)
        value = value.isoformat()
    if isinstance(value, str):
        try:
            return float(Time(value.rstrip("Z"), format="isot", scale="utc").mjd)
        except (ValueError, TypeError):
            pass
    raise ConfigError(f"{name} must be an ISO-8601 UTC time (e.g. '2024-05-01T03:20:00') or an "
                      f"MJD, not {_show(value)}")


# -- documents ---------------------------------------------------------------------------------

@dataclass(frozen=True)
class Profile:
    """A validated instrument profile (a field is None where its value failed validation)."""

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
    valid: bool = True      # False when the profile had errors (returned only to a Problems list)

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
    on_bad_exposure: str = "exclude"
    exclude: dict = field(default_factory=dict)   # kind -> tuple of items (see EXCLUDE_KINDS)
    valid: bool = True
    sources: dict = field(default_factory=dict)   # (stage, key) -> the file or --set option

    def source(self, stage, key):
        """Where a stage parameter was set: the visit file, ``--set ...``, or the file (default)."""
        return str(self.sources.get((stage, key), self.path))


def _renames(doc, key, path, problems, allowed_pattern, what):
    """Validated ``[keywords]`` or ``[extensions]`` map: printable ASCII strings, one-to-one."""
    table = doc.get(key) or {}
    out = {}
    for ours, theirs in table.items():
        if not isinstance(theirs, str) or not theirs.strip():
            problems.error(path, f"{key}.{ours} must be a {what} (a non-empty string), "
                                 f"not {_show(theirs)}")
            continue
        theirs = theirs.strip()
        if not allowed_pattern(theirs):
            problems.error(path, f"{key}.{ours} = {_show(theirs)} is not a valid {what}")
            continue
        out[ours] = theirs.upper() if key == "keywords" else theirs
    allowed = RAW_KEYWORDS if key == "keywords" else RAW_EXTENSIONS
    effective = {ours: out.get(ours, ours) for ours in allowed}
    seen = {}
    for ours, theirs in effective.items():
        norm = theirs.upper()
        if norm in seen:
            problems.error(path, f"{key}: {seen[norm]} and {ours} would both be read from "
                                 f"{theirs!r}; give each its own {what}")
        seen.setdefault(norm, ours)
    return out


def _is_keyword(text):
    return bool(_FITS_KEYWORD.match(text.upper()))


def _is_extname(text):
    return len(text) <= 68 and all(" " <= c <= "~" for c in text) and "'" not in text


def _load_profile(path, problems):
    raw = read_toml(path, "instrument profile", problems)
    if raw is None:
        return None
    before = len(problems.errors)
    doc = _check(raw, PROFILE_SCHEMA, path, problems)
    det, disp, trace = doc["detector"], doc["dispersion"], doc["trace"]
    for role, file in doc["reference_files"].items():
        if file is None:
            continue
        if not file.exists():
            problems.error(path, f"reference_files.{role} names {file}, which does not exist")
        elif not file.is_file():
            problems.error(path, f"reference_files.{role} names {file}, which is not a file")
    flat_range = doc["flat"]["wavelength_range"]
    if flat_range is not None and not flat_range[1] > flat_range[0]:
        problems.error(path, f"flat.wavelength_range must be [min, max] with max > min, "
                             f"got {list(flat_range)}")
        flat_range = None
    coeffs = disp["coefficients"]
    if coeffs is not None and (len(coeffs) < 2 or coeffs[1] == 0):
        problems.error(path, "dispersion.coefficients must hold at least [c0, c1] with c1 "
                             "(micrometres per column) not 0")
        coeffs = None
    keywords = _renames(raw, "keywords", path, problems, _is_keyword, "FITS keyword "
                        "(up to 8 characters A-Z, 0-9, '-', '_')") \
        if isinstance(raw.get("keywords", {}), dict) else {}
    extensions = _renames(raw, "extensions", path, problems, _is_extname,
                          "EXTNAME (printable ASCII, up to 68 characters)") \
        if isinstance(raw.get("extensions", {}), dict) else {}
    name = doc["name"] if isinstance(doc["name"], str) and doc["name"] else path.stem
    return Profile(path=path, name=name, gain=det["gain"], read_noise=det["read_noise"],
                   saturation=det["saturation"], full_shape=det["full_shape"],
                   files=doc["reference_files"], flat_range=flat_range, dispersion=coeffs,
                   column_offset=disp["column_offset"], row_offset=trace["row_offset"],
                   tilt=trace["tilt"], width=trace["width"], keywords=keywords,
                   extensions=extensions, valid=len(problems.errors) == before)


def load_profile(path, problems=None):
    """Read and validate an instrument profile.

    Parameters
    ----------
    path : str or Path
    problems : Problems, optional
        Where to add every problem found; the profile is then returned even
        when some of its values failed (those fields are None, ``valid`` is
        False), or None when the file cannot be read as TOML.  Without it the
        first call that finds a problem raises.

    Returns
    -------
    Profile or None

    Raises
    ------
    ConfigError
        Without ``problems``: every problem, one per line, each naming the
        file and the key.
    """
    own = problems is None
    problems = Problems() if own else problems
    path = Path(path).resolve()
    profile = _load_profile(path, problems)
    if own:
        problems.raise_errors(ConfigError)
    return profile


def _check_ld_table(path, event, problems):
    """The event's limb-darkening table: all three lists or none, of one length,
    wavelengths increasing.  Absent, the keys are removed (the event is unchanged)."""
    keys = ("ld_wavelength", "ld_u1", "ld_u2")
    given = [k for k in keys if event.get(k) is not None]
    if not given:
        for k in keys:
            event.pop(k, None)
        return
    if len(given) != 3:
        missing = [k for k in keys if k not in given]
        problems.error(path, f"event.{given[0]} needs event.{missing[0]} too (a limb-darkening "
                             f"table is ld_wavelength, ld_u1 and ld_u2)")
        return
    lengths = {k: len(event[k]) for k in keys}
    if len(set(lengths.values())) != 1 or lengths["ld_wavelength"] < 1:
        problems.error(path, f"event.ld_wavelength, ld_u1 and ld_u2 must have one equal, non-zero "
                             f"length; got {lengths}")
    elif any(b <= a for a, b in zip(event["ld_wavelength"], event["ld_wavelength"][1:])):
        problems.error(path, "event.ld_wavelength must increase")


def _load_visit(path, settings, problems):
    raw = read_toml(path, "visit description", problems)
    if raw is None:
        return None
    before = len(problems.errors)
    doc = _check(raw, VISIT_SCHEMA, path, problems)
    visit = doc["visit"]
    if visit["raw"] is not None and not visit["raw"].is_dir():
        problems.error(path, f"visit.raw names {visit['raw']}, which is not a directory")
    profile = None
    if visit["profile"] is not None:
        profile = _load_profile(visit["profile"], problems)
    event = dict(doc["event"])
    event["u1"] = 0.0 if event["u1"] is None else event["u1"]
    event["u2"] = 0.0 if event["u2"] is None else event["u2"]
    if event["duration"] is not None and event["period"] is not None \
            and event["duration"] >= event["period"]:
        problems.error(path, f"event.duration ({event['duration']:g} d) must be shorter than "
                             f"event.period ({event['period']:g} d)")
    if event["a_rs"] is not None and event["a_rs"] <= 1.0:
        problems.error(path, f"event.a_rs must exceed 1 (an orbit outside the star), "
                             f"got {event['a_rs']:g}")
    if event["rp_rs"] is not None and event["a_rs"] is not None \
            and event["inclination"] is not None and event["a_rs"] > 1.0:
        impact = event["a_rs"] * abs(math.cos(math.radians(event["inclination"])))
        if impact >= 1.0 + event["rp_rs"]:
            problems.error(path, f"event.inclination {event['inclination']:g} deg with a_rs "
                                 f"{event['a_rs']:g} gives impact parameter {impact:.2f} > "
                                 f"1 + rp_rs: the planet never crosses the star, there is no "
                                 f"{event['kind'] or 'event'}")
    _check_ld_table(path, event, problems)
    overrides = {}
    given = []          # (where, stage, key, value): every value checked, each problem reported
    for stage, table in (doc["stages"] or {}).items():
        if not isinstance(table, dict):
            problems.error(path, f"stages.{stage} must be a table [stages.{stage}]")
            continue
        given += [(path, stage, key, value) for key, value in table.items()]
    for stage, key, value in settings or ():
        shown = ("[" + ", ".join(f"{v:g}" if isinstance(v, (int, float)) and not isinstance(v, bool)
                                 else str(v) for v in value) + "]"
                 if isinstance(value, (list, tuple))
                 else str(value).lower() if isinstance(value, bool) else value)
        given.append((f"--set {stage}.{key}={shown}", stage, key, value))
    stages = {stage: resolve(stage, None) for stage in STAGE_ORDER}
    sources = {}
    for where, stage, key, value in given:
        checked = _stage_value(where, stage, key, value, problems)
        if checked is not _FAILED:
            stages[stage][key] = checked
            overrides.setdefault(stage, {})[key] = checked
            sources[(stage, key)] = where
    notebook = visit["notebook"] or path.parent / "notebook"
    exclude = {kind: tuple(doc["exclude"][kind] or ()) for kind in EXCLUDE_KINDS}
    return Visit(path=path, name=visit["name"] if visit["name"] is not None else path.stem,
                 raw=visit["raw"], profile=profile, notebook=notebook, target=doc["target"],
                 event=event, stages=stages, overrides=overrides,
                 on_bad_exposure=visit["on_bad_exposure"] or "exclude", exclude=exclude,
                 valid=len(problems.errors) == before, sources=sources)


_FAILED = object()


def _stage_value(where, stage, key, value, problems):
    """A stage parameter's converted value, or _FAILED after adding the problem."""
    from lightledger.pipeline.parameters import STAGES

    mark = "\x00"
    name = f"stages.{stage}.{key}" if isinstance(where, Path) else f"{stage}.{key}"
    try:
        if stage not in STAGES:
            raise ParameterError(f"{mark}: unknown stage {stage!r}")
        param = STAGES[stage].param(key, mark)
        return param.check(value, mark)
    except ParameterError as exc:
        text = str(exc)
        text = text.replace(f"{mark}: unknown key {stage}.", f"unknown key {name.rsplit('.', 1)[0]}.")
        text = text.replace(f"{mark}: {key}", name).replace(f"{mark}: ", "")
        problems.error(where, text)
        return _FAILED


def load_visit(path, settings=None, problems=None):
    """Read and validate a visit description and the profile it names.

    Parameters
    ----------
    path : str or Path
    settings : list of (stage, key, value), optional
        Command-line overrides, applied after the description's own
        ``[stages.*]`` tables (already parsed by
        :func:`lightledger.pipeline.parameters.parse_assignment`).
    problems : Problems, optional
        Where to add every problem (see :func:`load_profile`); the visit is
        then returned with ``valid`` False when any was found, or None when
        the file cannot be read as TOML.

    Returns
    -------
    Visit or None

    Raises
    ------
    ConfigError
        Without ``problems``: every problem of the description and of its
        profile, one per line.
    """
    own = problems is None
    problems = Problems() if own else problems
    path = Path(path).resolve()
    visit = _load_visit(path, settings, problems)
    if own:
        problems.raise_errors(ConfigError)
    return visit
