"""Reading raw visits in the project's raw exposure layout.

A visit is a directory of FITS files.  Each file holds one exposure (READS of
shape ``(n_reads, ny, nx)``) or a run of consecutive exposures with one read
pattern (``(n_exp, n_reads, ny, nx)`` with a STARTOFF extension).  The primary
header carries DATE-BEG, TIMESYS, XPOSURE, SCANVEL and optionally OBSGEO-X/Y/Z,
SUBORIGX/Y and INSTPROF; the README's "Raw exposure layout" section is the full
description.  Every keyword and extension name goes through the instrument
profile, which may rename them.

:func:`survey` reads headers only and lists every exposure in start-time
order.  It never stops at a damaged file: a file or exposure that cannot be
used (truncated, a damaged header, a missing or malformed keyword or
extension, broken read times, a duplicate start time, a frame shape or
subarray that differs from the rest of the visit) is kept in the list,
marked ``excluded`` with its ``reason``, and the reason is added to the
caller's problems.  :func:`inventory` is the strict form (any such problem
raises).  :func:`read_exposure` then reads one exposure's reads at a time
through a memory map, so no stage needs a whole visit in memory.

The file structure is walked here block by block (FITS Standard 4.0,
sections 3.3-4.4: 2880-byte blocks, 80-character ASCII cards ending with
END, data sized by BITPIX, NAXISn, PCOUNT and GCOUNT), before astropy parses
any header card, so that a truncated file or a zeroed header is named at
once instead of being searched for a header through its data.

This module holds the visit (survey, inventory and its table); the FITS
structure walk (:mod:`.fitsblocks`), one file's exposures
(:mod:`.rawfile`, :class:`ExposureRef`) and reading the reads
(:mod:`.rawread`) live in their own modules and are re-exported here.
"""

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
from astropy.table import Table

from lightledger.pipeline.errors import InputFileError

from .digests import sha256_of  # noqa: F401  (the one file digest; rawio.sha256_of kept)
# the FITS structure walk, one file's exposures and reading the reads, one module each,
# re-exported here so that ``from lightledger.tasks.rawio import NAME`` keeps working
from .fitsblocks import (_BITPIX, _MAX_HEADER_BLOCKS, BLOCK, HDUInfo, _card,  # noqa: F401
                         _card_int, _Damage, _read_array, _read_header, _scale_into, _scaled,
                         _short, fits_structure)
from .problems import Problems
from .rawfile import (ExposureRef, _file_exposures, _find, _header_value, _list,  # noqa: F401
                      _times_vector, _Unusable)
from .rawread import _read_exposure_astropy, read_exposure, read_exposures  # noqa: F401

__all__ = ["ExposureRef", "survey", "inventory", "read_exposure", "read_exposures", "sha256_of",
           "inventory_table", "refs_from_table", "usable", "set_aside", "fits_structure",
           "BLOCK"]


# -- the visit ---------------------------------------------------------------------------------

def set_aside(ref, reason):
    """``ref`` marked excluded; an already excluded ref keeps its first reason."""
    if ref.excluded:
        return ref
    return replace(ref, excluded=True, reason=reason)


def usable(refs):
    """The refs that are not excluded, in order."""
    return [r for r in refs if not r.excluded]


def _majority(values):
    counts = {}
    for v in values:
        counts[v] = counts.get(v, 0) + 1
    return max(counts.items(), key=lambda kv: (kv[1], -list(counts).index(kv[0])))[0]


def survey(raw_dir, profile, problems):
    """Every exposure of a visit in start-time order, reading headers only.

    Parameters
    ----------
    raw_dir : str or Path
        Directory of ``*.fits`` files.
    profile : lightledger.tasks.config.Profile
        Supplies renamed keywords and extensions.
    problems : Problems
        Receives an error for a visit without any file, and one warning per
        exposure set aside (``FILE: set aside: reason``); the caller decides
        whether set-aside exposures stop the reduction.

    Returns
    -------
    refs : list of ExposureRef
        Usable and set-aside exposures, numbered (``exposure``) in start-time
        order; exposures of unreadable files, whose time is unknown, come
        last.
    """
    raw_dir = Path(raw_dir)
    try:
        files = sorted(p for p in raw_dir.glob("*.fits") if p.is_file())
    except OSError as exc:
        problems.error(raw_dir, f"cannot list the visit directory ({exc.strerror or exc})")
        return []
    if not files:
        problems.error(raw_dir, "no *.fits files in the visit directory")
        return []
    notes = {}
    refs = []
    for path in files:
        found = []
        refs += _file_exposures(path, profile, found)
        for kind, text in found:
            notes.setdefault(kind, []).append((path, text))
    for kind, items in notes.items():       # one line per kind of note, naming the first file
        path, text = items[0]
        more = f" (and {len(items) - 1} more files)" if len(items) > 1 else ""
        problems.warning(path, text + more)
    good = usable(refs)
    if good:
        frame = _majority([r.shape[1:] for r in good])
        origin = _majority([r.origin for r in good])
        n = sum(1 for r in good if r.shape[1:] == frame)
        refs = [set_aside(r, f"frame shape {r.shape[1:]} differs from the visit's {frame} "
                             f"({n} of {len(good)} exposures)")
                if not r.excluded and r.shape[1:] != frame else r for r in refs]
        refs = [set_aside(r, f"subarray origin {r.origin} differs from the visit's {origin}")
                if not r.excluded and r.origin != origin else r for r in refs]
    refs = _order(refs, problems)
    return refs


def _order(refs, problems):
    """Sort by start time, set aside duplicates, warn about overlaps, number the exposures."""
    timed = sorted((r for r in refs if math.isfinite(r.start_mjd)),
                   key=lambda r: (r.start_mjd, r.file, r.index))
    untimed = [r for r in refs if not math.isfinite(r.start_mjd)]
    out = []
    overlaps = []
    previous = None         # last usable exposure
    for r in timed:
        if not r.excluded and previous is not None:
            gap = (r.start_mjd - previous.start_mjd) * 86400.0
            if abs(gap) < 1e-3:
                r = set_aside(r, f"starts at the same time as {previous.label} (a duplicate "
                                 f"start time)")
            elif gap < previous.read_times[-1] - 1e-3:
                overlaps.append((r, previous, gap))
        if not r.excluded:
            previous = r
        out.append(r)
    if overlaps:
        r, previous, gap = overlaps[0]
        more = f" ({len(overlaps) - 1} more exposures overlap the one before)" if len(overlaps) > 1 else ""
        problems.warning(r.file, f"exposure {r.label} starts {gap:.3f} s after the zero read of "
                                 f"{previous.label}, before that exposure's last read "
                                 f"({previous.read_times[-1]:g} s): the times of one of them are "
                                 f"wrong{more}")
    out += untimed
    return [replace(r, exposure=k) for k, r in enumerate(out)]


def report_set_aside(refs, problems, level="warning"):
    """Add one problem per set-aside exposure (a file set aside whole is named once)."""
    seen = set()
    for r in refs:
        if r.excluded and (r.file, r.reason) not in seen:
            seen.add((r.file, r.reason))
            label = r.label if r.index >= 0 else r.file
            problems.add(label, r.reason if level == "error" else f"set aside: {r.reason}", level)


def inventory(raw_dir, profile, problems=None):
    """Every exposure of a visit in start-time order, strictly: any unusable file raises.

    Parameters
    ----------
    raw_dir : str or Path
    profile : lightledger.tasks.config.Profile
    problems : Problems, optional
        With it, the usable and set-aside exposures are returned and each
        set-aside one adds a warning (see :func:`survey`).

    Returns
    -------
    refs : list of ExposureRef

    Raises
    ------
    InputFileError
        Without ``problems``: for an empty directory or any exposure that
        cannot be used, one line each.
    """
    own = problems is None
    collected = Problems()
    refs = survey(raw_dir, profile, collected)
    report_set_aside(refs, collected, level="error" if own else "warning")
    if own:
        collected.raise_errors(InputFileError)
        return refs
    problems.extend(collected)
    return refs


def inventory_table(refs):
    """The inventory as an astropy Table (one row per exposure, set-aside ones included)."""
    n_reads = max([len(r.read_times) for r in refs] + [1])
    times = np.full((len(refs), n_reads), np.nan)
    for i, r in enumerate(refs):
        times[i, :len(r.read_times)] = r.read_times
    geo = np.array([r.obsgeo if r.obsgeo is not None else (np.nan,) * 3 for r in refs],
                   float).reshape(len(refs), 3)
    table = Table()
    table["exposure"] = np.array([r.exposure for r in refs], dtype=np.int64)
    table["file"] = [Path(r.file).name for r in refs]
    table["index"] = np.array([r.index for r in refs], dtype=np.int64)
    table["start_mjd_utc"] = np.array([r.start_mjd for r in refs], float)
    table["start_mjd_utc"].unit = "d"
    table["exposure_time"] = np.array([r.exposure_time for r in refs], float)
    table["exposure_time"].unit = "s"
    table["scan_velocity"] = np.array([r.scan_velocity for r in refs], float)
    table["read_times"] = times
    table["read_times"].unit = "s"
    table["obsgeo"] = geo
    table["obsgeo"].unit = "m"
    table["origin_x"] = np.array([r.origin[0] for r in refs], dtype=np.int64)
    table["origin_y"] = np.array([r.origin[1] for r in refs], dtype=np.int64)
    table["shape"] = np.array([r.shape for r in refs], dtype=np.int32).reshape(len(refs), 3)
    table["excluded"] = np.array([r.excluded for r in refs], dtype=bool)
    table["reason"] = [r.reason for r in refs]
    table["data_offset"] = np.array([r.data_offset for r in refs], dtype=np.int64)
    table["bitpix"] = np.array([r.bitpix for r in refs], dtype=np.int16)
    table["bscale"] = np.array([r.bscale for r in refs], float)
    table["bzero"] = np.array([r.bzero for r in refs], float)
    table["blank"] = np.array([r.blank for r in refs], float)
    return table


def refs_from_table(table, raw_dir):
    """Rebuild :class:`ExposureRef` objects from :func:`inventory_table`'s table."""
    refs = []
    names = table.colnames
    for k, row in enumerate(table):
        times = np.asarray(row["read_times"], float)
        times = times[np.isfinite(times)]
        geo = np.asarray(row["obsgeo"], float)
        extra = {}
        if "excluded" in names:
            extra = dict(excluded=bool(row["excluded"]), reason=str(row["reason"] or ""),
                         data_offset=int(row["data_offset"]), bitpix=int(row["bitpix"]),
                         bscale=float(row["bscale"]), bzero=float(row["bzero"]),
                         blank=float(row["blank"]))
        refs.append(ExposureRef(file=str(Path(raw_dir) / row["file"]), index=int(row["index"]),
                                start_mjd=float(row["start_mjd_utc"]),
                                read_times=tuple(times), exposure_time=float(row["exposure_time"]),
                                scan_velocity=float(row["scan_velocity"]),
                                origin=(int(row["origin_x"]), int(row["origin_y"])),
                                obsgeo=None if np.isnan(geo).any() else tuple(geo),
                                shape=tuple(int(v) for v in row["shape"]),
                                exposure=int(row["exposure"]) if "exposure" in names else k,
                                **extra))
    return refs
