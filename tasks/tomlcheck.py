"""Reading a TOML document and checking it against a schema, one problem per line.

:func:`read_toml` reads a file (missing, a directory, not UTF-8, not valid
TOML: one problem naming the file); :func:`check_schema` checks a document
against a schema of :class:`~.schemas.Key` (unknown keys with the nearest
valid one, missing keys, types, ranges, the ``[exclude]`` lists), adding each
problem to the caller's :class:`~.problems.Problems`.  Used by :mod:`.config`
and the programme description.
"""

import datetime as _dt
import math
import tomllib
from pathlib import Path

from lightledger.pipeline.errors import ConfigError
from lightledger.pipeline.parameters import nearest

from .problems import Problems
from .schemas import Key

__all__ = ["read_toml", "check_schema"]


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
