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
"""

import hashlib
import math
import os
import warnings
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time

from lightledger.pipeline.errors import InputFileError

from .problems import Problems

__all__ = ["ExposureRef", "survey", "inventory", "read_exposure", "read_exposures", "sha256_of",
           "inventory_table", "refs_from_table", "usable", "set_aside", "fits_structure",
           "BLOCK"]

#: FITS block length in bytes (FITS Standard 4.0, sect. 3.1).
BLOCK = 2880
_MAX_HEADER_BLOCKS = 1000
_BITPIX = {8: "u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}


@dataclass(frozen=True)
class ExposureRef:
    """Where one exposure lives and how it was read.

    Attributes
    ----------
    file : str
        Path of the FITS file.
    index : int
        Index along the exposure axis of a 4-D READS, or -1 for a 3-D one.
    start_mjd : float
        MJD (UTC) of the zero read (NaN when unknown).
    read_times : tuple of float
        Seconds of each read after the zero read.
    exposure_time : float
        XPOSURE, seconds.
    scan_velocity : float
        Rows per second, signed; 0 for a staring exposure.
    origin : tuple of int
        (SUBORIGX, SUBORIGY).
    obsgeo : tuple of float or None
        Observer's geocentric (x, y, z) in metres, or None for the geocentre.
    shape : tuple of int
        (n_reads, ny, nx).
    exposure : int
        Number in the visit's start-time order (from 0), -1 when unknown.
    excluded : bool
        True when the exposure is set aside; ``reason`` says why.
    reason : str
        Why the exposure is set aside ('' when it is used).
    data_offset : int
        Byte offset of the exposure's first read in the file.
    bitpix, bscale, bzero, blank : int, float, float, float
        Storage of READS (FITS BITPIX, BSCALE, BZERO, and BLANK of integer
        data, NaN when absent).
    """

    file: str
    index: int
    start_mjd: float
    read_times: tuple
    exposure_time: float
    scan_velocity: float
    origin: tuple
    obsgeo: tuple | None
    shape: tuple
    exposure: int = -1
    excluded: bool = False
    reason: str = ""
    data_offset: int = -1
    bitpix: int = -32
    bscale: float = 1.0
    bzero: float = 0.0
    blank: float = float("nan")

    @property
    def label(self):
        """``FILE`` or ``FILE[index]`` for messages."""
        return self.file if self.index < 0 else f"{self.file}[{self.index}]"

    @property
    def wrap(self):
        """Span of integer storage in ADU (2**bits * BSCALE), 0 for floating point."""
        return 0.0 if self.bitpix < 0 else float(2 ** self.bitpix) * abs(self.bscale)


# -- FITS structure ----------------------------------------------------------------------------

class _Damage(Exception):
    """A file that does not follow the FITS structure (message: what is wrong)."""


@dataclass(frozen=True)
class HDUInfo:
    """One HDU found by :func:`fits_structure`."""

    index: int
    header_offset: int
    data_offset: int
    data_bytes: int
    header: fits.Header
    kind: str            # "PRIMARY", "IMAGE", "BINTABLE", "TABLE", ...
    name: str            # EXTNAME ('' when absent; 'PRIMARY' for the primary HDU)
    bitpix: int
    shape: tuple         # numpy order (NAXISn .. NAXIS1)


def _card(header, key, default=None):
    """A header value; an unparsable card raises _Damage naming it."""
    try:
        return header[key] if key in header else default
    except Exception as exc:     # astropy's VerifyError on a damaged card
        raise _Damage(f"header card {key} cannot be parsed ({_short(exc)})") from None


def _card_int(header, key, where, default=None):
    if key not in header:
        if default is not None:
            return default
        raise _Damage(f"{where} header has no {key} card")
    try:
        value = header[key]
    except Exception as exc:     # astropy's VerifyError on a damaged card
        raise _Damage(f"{where} header card {key} cannot be parsed ({_short(exc)})") from None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise _Damage(f"{where} header card {key} must be an integer, found {value!r}")
    return int(value)


def _read_header(fh, offset, size, index):
    where = "primary" if index == 0 else f"HDU {index}"
    blocks = []
    fh.seek(offset)
    for _ in range(_MAX_HEADER_BLOCKS):
        block = fh.read(BLOCK)
        if len(block) < BLOCK:
            if not blocks and not block:
                return None, offset
            raise _Damage(f"{where} header is cut short at byte {offset + len(b''.join(blocks)) + len(block)} "
                          f"(the file is truncated)")
        if not blocks:
            first = block[:8].decode("ascii", "replace").rstrip()
            expected = "SIMPLE" if index == 0 else "XTENSION"
            if first != expected:
                if index == 0:
                    raise _Damage("not a FITS file (it does not begin with a SIMPLE card)")
                raise _Damage(f"{where} header at byte {offset} is damaged (it does not begin "
                              f"with XTENSION)")
        if any(b < 0x20 or b > 0x7E for b in block):
            raise _Damage(f"{where} header at byte {offset} holds bytes that are not ASCII text "
                          f"(damaged)")
        blocks.append(block)
        for k in range(0, BLOCK, 80):
            if block[k:k + 8] == b"END     " and not block[k + 8:k + 80].strip():
                text = b"".join(blocks).decode("ascii")
                return text, offset + BLOCK * len(blocks)
    raise _Damage(f"{where} header has no END card within {_MAX_HEADER_BLOCKS} blocks (damaged)")


def fits_structure(path):
    """Every HDU of a FITS file, found by walking its blocks; raises on damage.

    Only headers are read.  Each HDU's data must be present in full (the
    file may lack the padding of its last block).

    Returns
    -------
    list of HDUInfo

    Raises
    ------
    _Damage
        With a message saying what is wrong and where.
    """
    size = os.path.getsize(path)
    if size == 0:
        raise _Damage("the file is empty")
    hdus = []
    offset = 0
    with open(path, "rb") as fh:
        while offset < size:
            index = len(hdus)
            if index and size - offset < BLOCK:
                fh.seek(offset)
                tail = fh.read(size - offset)
                if tail.startswith(b"XTENSION"):
                    raise _Damage(f"HDU {index} header is cut short at byte {size} (the file is "
                                  f"truncated)")
                if tail.strip(b"\0 "):
                    raise _Damage(f"{size - offset} bytes after the last HDU are not FITS "
                                  f"(the file is damaged)")
                break
            text, data_offset = _read_header(fh, offset, size, index)
            if text is None:
                break
            where = "primary" if index == 0 else f"HDU {index}"
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    header = fits.Header.fromstring(text)
                except Exception as exc:   # astropy's parser on damaged text
                    raise _Damage(f"{where} header cannot be parsed ({_short(exc)})") from None
                bitpix = _card_int(header, "BITPIX", where)
                if bitpix not in _BITPIX:
                    raise _Damage(f"{where} header card BITPIX is {bitpix}; FITS allows 8, 16, "
                                  f"32, 64, -32, -64")
                naxis = _card_int(header, "NAXIS", where)
                if not 0 <= naxis <= 999:
                    raise _Damage(f"{where} header card NAXIS is {naxis}")
                axes = [_card_int(header, f"NAXIS{k}", where) for k in range(1, naxis + 1)]
                if any(a < 0 for a in axes):
                    raise _Damage(f"{where} header has a negative NAXISn")
                pcount = _card_int(header, "PCOUNT", where, default=0)
                gcount = _card_int(header, "GCOUNT", where, default=1)
                kind = "PRIMARY" if index == 0 else str(_card(header, "XTENSION", "")).strip().upper()
                name = "PRIMARY" if index == 0 else str(_card(header, "EXTNAME", "")).strip()
            count = math.prod(axes) if naxis else 0
            data_bytes = abs(bitpix) // 8 * gcount * (pcount + count) if naxis else 0
            if data_offset + data_bytes > size:
                missing = data_offset + data_bytes - size
                raise _Damage(f"{where} ({name or kind}) data are cut short: the file ends "
                              f"{missing} bytes before the end of the data (truncated)")
            hdus.append(HDUInfo(index=index, header_offset=offset, data_offset=data_offset,
                                data_bytes=data_bytes, header=header, kind=kind, name=name,
                                bitpix=bitpix, shape=tuple(reversed(axes))))
            offset = data_offset + -(-data_bytes // BLOCK) * BLOCK
    if not hdus:
        raise _Damage("not a FITS file")
    return hdus


def _short(exc):
    text = " ".join(str(exc).split())
    return text if len(text) <= 120 else text[:117] + "..."


def _read_array(path, hdu, dtype=np.float64):
    """Whole data array of an image HDU (small arrays: READTIME, STARTOFF), scaled."""
    raw = np.fromfile(path, dtype=_BITPIX[hdu.bitpix], count=math.prod(hdu.shape),
                      offset=hdu.data_offset).reshape(hdu.shape)
    return _scaled(raw, hdu.header.get("BSCALE", 1.0), hdu.header.get("BZERO", 0.0),
                   hdu.header.get("BLANK") if hdu.bitpix > 0 else None, dtype)


def _scale_into(out, raw, ref):
    """Write ``raw`` (the stored values of ``ref``'s data) scaled into ``out``, as :func:`_scaled`."""
    np.copyto(out, raw, casting="unsafe")
    if ref.bitpix > 0 and math.isfinite(ref.blank):
        out[raw == int(ref.blank)] = np.nan
    if ref.bscale != 1:
        out *= ref.bscale
    if ref.bzero != 0:
        out += ref.bzero


def _scaled(raw, bscale, bzero, blank, dtype=np.float64):
    out = raw.astype(dtype)
    if blank is not None:
        out[raw == blank] = np.nan
    if bscale != 1:
        out *= bscale
    if bzero != 0:
        out += bzero
    return out


# -- headers of one file -----------------------------------------------------------------------

class _Unusable(Exception):
    """A file whose exposures cannot be used (message: the reason)."""


def _header_value(header, key, kind, required=True, default=None):
    """A primary-header value of the wanted kind; _Unusable naming the keyword otherwise."""
    try:
        present = key in header
        value = header[key] if present else None
    except Exception as exc:    # astropy's VerifyError on an unparsable card
        raise _Unusable(f"primary header card {key} cannot be parsed ({_short(exc)})") from None
    if not present:
        if required:
            raise _Unusable(f"primary header has no {key} keyword")
        return default
    if kind is str:
        if not isinstance(value, str):
            raise _Unusable(f"keyword {key} must be a string, found {value!r}")
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise _Unusable(f"keyword {key} must be a number, found {value!r}")
    if kind is int:
        if float(value) != int(value):
            raise _Unusable(f"keyword {key} must be a whole number, found {value!r}")
        return int(value)
    value = float(value)
    if not math.isfinite(value):
        raise _Unusable(f"keyword {key} must be a finite number, found {value!r}")
    return value


def _find(hdus, name, what):
    found = [h for h in hdus[1:] if h.name.upper() == name.upper()]
    if not found:
        names = [h.name for h in hdus[1:] if h.name]
        raise _Unusable(f"no {name} extension ({what}; extensions found: "
                        f"{', '.join(names) if names else 'none'})")
    if len(found) > 1:
        raise _Unusable(f"{len(found)} extensions are named {name}")
    hdu = found[0]
    if hdu.kind != "IMAGE":
        raise _Unusable(f"extension {name} is a {hdu.kind or 'non-standard'} HDU; the layout wants "
                        f"an image ({what})")
    return hdu


def _times_vector(path, hdu, name, n, what):
    if math.prod(hdu.shape) != n or (len(hdu.shape) > 1 and max(hdu.shape) != n):
        raise _Unusable(f"extension {name} holds {math.prod(hdu.shape)} values for {n} {what}")
    try:
        values = _read_array(path, hdu).ravel()
    except Exception as exc:     # a damaged BSCALE/BZERO/BLANK card, an unreadable file
        raise _Unusable(f"extension {name} cannot be read ({_short(exc)})") from None
    return values


def _file_exposures(path, profile, notes):
    """ExposureRefs of one file; set aside (with the reason) when unusable.

    ``notes`` receives (kind, text) of things to warn about that do not make
    the file unusable.
    """
    kw, ext = profile.keyword, profile.extension
    start_mjd = float("nan")     # known once DATE-BEG is read: a file set aside keeps its time
    try:
        try:
            hdus = fits_structure(path)
        except _Damage as exc:
            raise _Unusable(str(exc)) from None
        except OSError as exc:
            raise _Unusable(f"cannot be read ({exc.strerror or exc})") from None
        hdr = hdus[0].header
        date = _header_value(hdr, kw("DATE-BEG"), str)
        timesys = _header_value(hdr, kw("TIMESYS"), str, required=False, default="UTC")
        if timesys.strip().upper() != "UTC":
            raise _Unusable(f"{kw('TIMESYS')} is {timesys!r}; only UTC is supported")
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                start_mjd = float(Time(date.strip(), format="isot", scale="utc").mjd)
        except (ValueError, TypeError):
            raise _Unusable(f"{kw('DATE-BEG')} {date!r} is not an ISO-8601 time") from None
        xposure = _header_value(hdr, kw("XPOSURE"), float)
        if not xposure > 0:
            raise _Unusable(f"{kw('XPOSURE')} is {xposure:g} s; an exposure time must be positive")
        scanvel = _header_value(hdr, kw("SCANVEL"), float)
        origin = (_header_value(hdr, kw("SUBORIGX"), int, required=False, default=0),
                  _header_value(hdr, kw("SUBORIGY"), int, required=False, default=0))
        if min(origin) < 0:
            raise _Unusable(f"{kw('SUBORIGX')}/{kw('SUBORIGY')} must be >= 0, found {origin}")
        geo = [_header_value(hdr, kw(k), float, required=False)
               for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z")]
        if any(g is None for g in geo) and not all(g is None for g in geo):
            raise _Unusable(f"{kw('OBSGEO-X')}/Y/Z must be given all three or none")
        obsgeo = None if geo[0] is None else tuple(geo)
        if obsgeo is not None and not 6.3e6 <= math.hypot(*obsgeo) <= 1e11:
            # FITS Standard 4.0 / Rots et al. 2015: geocentric position in metres; anything
            # inside the Earth or beyond 100 million km is not an observer's position
            raise _Unusable(f"{kw('OBSGEO-X')}/Y/Z = {obsgeo} m is not a geocentric position in "
                            f"metres (distance {math.hypot(*obsgeo):.3g} m)")

        reads = _find(hdus, ext("READS"), "the reads")
        if len(reads.shape) not in (3, 4):
            raise _Unusable(f"extension {ext('READS')} must be 3-D or 4-D, found "
                            f"{len(reads.shape)}-D")
        shape = reads.shape
        n_reads = shape[-3]
        if n_reads < 2:
            raise _Unusable(f"extension {ext('READS')} holds {n_reads} reads per exposure; an "
                            f"exposure needs at least 2")
        if min(shape) < 1:
            raise _Unusable(f"extension {ext('READS')} has an empty axis, shape {shape}")
        times = _find(hdus, ext("READTIME"), "seconds of each read")
        read_times = _times_vector(path, times, ext("READTIME"), n_reads, "reads")
        if not np.all(np.isfinite(read_times)):
            raise _Unusable(f"extension {ext('READTIME')} holds non-finite values")
        if read_times[0] != 0 or np.any(np.diff(read_times) <= 0):
            raise _Unusable(f"extension {ext('READTIME')} must start at 0 and increase, found "
                            f"{_list(read_times)}")
        span = float(read_times[-1])
        if abs(xposure - span) > 0.01 * span + 0.05:
            notes.append(("xposure", f"{kw('XPOSURE')} ({xposure:g} s) disagrees with the last "
                                     f"read of {ext('READTIME')} ({span:g} s), which the layout "
                                     f"defines as the same time; XPOSURE is used"))
        if len(shape) == 4:
            offsets_hdu = _find(hdus, ext("STARTOFF"), "start of each exposure; required for 4-D "
                                                       f"{ext('READS')}")
            offsets = _times_vector(path, offsets_hdu, ext("STARTOFF"), shape[0], "exposures")
            indices = range(shape[0])
        else:
            offsets, indices = np.zeros(1), [-1]
    except _Unusable as exc:
        return [ExposureRef(file=str(path), index=-1, start_mjd=start_mjd, read_times=(),
                            exposure_time=float("nan"), scan_velocity=float("nan"), origin=(0, 0),
                            obsgeo=None, shape=(0, 0, 0), excluded=True, reason=str(exc))]
    try:
        bscale = float(reads.header.get("BSCALE", 1.0))
        bzero = float(reads.header.get("BZERO", 0.0))
        blank = reads.header.get("BLANK") if reads.bitpix > 0 else None
        blank = float(blank) if isinstance(blank, (int, np.integer)) else float("nan")
        if not (math.isfinite(bscale) and bscale != 0 and math.isfinite(bzero)):
            raise ValueError
    except Exception:
        return [ExposureRef(file=str(path), index=-1, start_mjd=float("nan"), read_times=(),
                            exposure_time=float("nan"), scan_velocity=float("nan"), origin=(0, 0),
                            obsgeo=None, shape=(0, 0, 0), excluded=True,
                            reason=f"extension {ext('READS')} has unusable BSCALE/BZERO/BLANK "
                                   f"cards")]
    per_exposure = abs(reads.bitpix) // 8 * math.prod(shape[-3:])
    refs = []
    for i, offset in zip(indices, offsets):
        reason = ""
        if not math.isfinite(offset):
            reason = f"extension {ext('STARTOFF')} value {i} is {float(offset)}, not a time"
        start = start_mjd + (offset / 86400.0 if math.isfinite(offset) else 0.0)
        refs.append(ExposureRef(file=str(path), index=int(i),
                                start_mjd=float(start) if not reason else float("nan"),
                                read_times=tuple(float(t) for t in read_times),
                                exposure_time=xposure, scan_velocity=scanvel, origin=origin,
                                obsgeo=obsgeo, shape=tuple(int(s) for s in shape[-3:]),
                                excluded=bool(reason), reason=reason,
                                data_offset=reads.data_offset + max(int(i), 0) * per_exposure,
                                bitpix=reads.bitpix, bscale=bscale, bzero=bzero, blank=blank))
    return refs


def _list(values, n=6):
    text = ", ".join(f"{v:g}" for v in values[:n])
    return f"[{text}{', ...' if len(values) > n else ''}]"


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


def read_exposure(ref, profile=None):
    """The reads of one exposure, in ADU.

    Parameters
    ----------
    ref : ExposureRef
    profile : lightledger.tasks.config.Profile, optional
        Unused (the inventory located the data); kept for callers.

    Returns
    -------
    reads : ndarray of shape (n_reads, ny, nx), float64
        BSCALE and BZERO applied; integer BLANK values are NaN.
    """
    if ref.excluded:
        raise InputFileError(f"{ref.label}: the exposure was set aside ({ref.reason})")
    if ref.data_offset < 0:
        return _read_exposure_astropy(ref, profile)
    try:
        data = np.memmap(ref.file, dtype=_BITPIX[ref.bitpix], mode="r", offset=ref.data_offset,
                         shape=ref.shape)
        blank = int(ref.blank) if ref.bitpix > 0 and math.isfinite(ref.blank) else None
        reads = _scaled(np.asarray(data), ref.bscale, ref.bzero, blank)
        del data
    except (OSError, ValueError) as exc:
        raise InputFileError(f"{ref.label}: cannot read the reads of the exposure "
                             f"({_short(exc)}); the file changed since the inventory?") from None
    return reads


def _read_exposure_astropy(ref, profile):
    name = profile.extension("READS") if profile is not None else "READS"
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with fits.open(ref.file, memmap=True) as hdul:
                data = hdul[name].data
                block = data[ref.index] if ref.index >= 0 else data
                return np.array(block, dtype=np.float64)
    except Exception as exc:
        raise InputFileError(f"{ref.label}: cannot read the {name} data ({_short(exc)})") from None


def sha256_of(path, block=1 << 20):
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(block), b""):
            digest.update(chunk)
    return digest.hexdigest()


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



def read_exposures(refs, profile=None, dtype=np.float32):
    """The reads of several exposures (a chunk), mapping each raw file once.

    Parameters
    ----------
    refs : sequence of ExposureRef
        Exposures of one frame shape, in the order wanted (none set aside).
    profile : lightledger.tasks.config.Profile, optional
        Used only for refs of an inventory that does not record the data's
        place in the file.
    dtype : numpy dtype, optional
        Of the returned reads.  float32 (the default) holds raw ADU exactly up
        to 2**24.

    Returns
    -------
    reads : ndarray of shape (n_exposures, n_reads, ny, nx), ADU
        BSCALE and BZERO applied; integer BLANK values are NaN.
    """
    if not refs:
        return np.empty(0, dtype)
    out = np.empty((len(refs),) + tuple(refs[0].shape), dtype=dtype)
    by_file = {}
    for i, ref in enumerate(refs):
        if ref.excluded:
            raise InputFileError(f"{ref.label}: the exposure was set aside ({ref.reason})")
        if tuple(ref.shape) != tuple(refs[0].shape):
            raise InputFileError(f"{ref.label}: frame shape {ref.shape} differs from "
                                 f"{refs[0].shape} of the chunk's other exposures")
        by_file.setdefault(ref.file, []).append(i)
    for file, slots in by_file.items():
        chosen = [refs[i] for i in slots]
        if any(r.data_offset < 0 for r in chosen):
            for i in slots:
                out[i] = _read_exposure_astropy(refs[i], profile)
            continue
        item = np.dtype(_BITPIX[chosen[0].bitpix]).itemsize
        count = math.prod(chosen[0].shape)
        first = min(r.data_offset for r in chosen)
        last = max(r.data_offset for r in chosen) + count * item
        try:
            data = np.memmap(file, dtype=_BITPIX[chosen[0].bitpix], mode="r", offset=first,
                             shape=((last - first) // item,))
            offsets = np.array([r.data_offset for r in chosen])
            scaling = {(r.bscale, r.bzero, r.blank) for r in chosen}
            if len(scaling) == 1 and np.array_equal(np.diff(slots), np.ones(len(slots) - 1)) \
                    and np.array_equal(offsets - first, np.arange(len(chosen)) * count * item):
                # consecutive exposures stored one after the other: converted in one pass
                ref = chosen[0]
                block = data[:len(chosen) * count].reshape((len(chosen),) + tuple(ref.shape))
                _scale_into(out[slots[0]:slots[-1] + 1], block, ref)
            else:
                for i, ref in zip(slots, chosen):
                    start = (ref.data_offset - first) // item
                    _scale_into(out[i], data[start:start + count].reshape(ref.shape), ref)
            del data
        except (OSError, ValueError) as exc:
            raise InputFileError(f"{file}: cannot read the reads of the exposures "
                                 f"({_short(exc)}); the file changed since the inventory?") from None
    return out
