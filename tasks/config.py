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
and ``VISIT_SCHEMA`` (:mod:`.schemas`); the README's "Instrument profile" and
"Visit description" sections document the same keys.  Reading a TOML file
and checking it against a schema is :mod:`.tomlcheck`; this module holds the
validated documents (:class:`Profile`, :class:`Visit`) and their loaders.
"""

import math
import re
from dataclasses import dataclass, field
from pathlib import Path

from lightledger.pipeline.errors import ConfigError, ParameterError
from lightledger.pipeline.parameters import STAGE_ORDER, resolve

from .problems import Problems
# the schemas and the TOML checks, one module each, re-exported here so that
# ``from lightledger.tasks.config import NAME`` keeps working
from .schemas import (EXCLUDE_KINDS, PROFILE_SCHEMA, RAW_EXTENSIONS, RAW_KEYWORDS,  # noqa: F401
                      VISIT_SCHEMA, Key)
from .tomlcheck import (_ITEM_KEYS, _check, _convert, _exclusions, _mjd, _number,  # noqa: F401
                        _show, check_schema, read_toml)

__all__ = ["Key", "PROFILE_SCHEMA", "VISIT_SCHEMA", "RAW_KEYWORDS", "RAW_EXTENSIONS",
           "EXCLUDE_KINDS", "Profile", "Visit", "load_profile", "load_visit", "fits_text",
           "read_toml", "check_schema"]


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
