"""One raw file's exposures, read from its headers: :class:`ExposureRef` and where each lives.

:func:`_file_exposures` walks a file's structure (:mod:`.fitsblocks`), reads
the primary header's keywords and the READS, READTIME and STARTOFF
extensions through the instrument profile's names, and returns one
:class:`ExposureRef` per exposure, each set aside with its reason when the
file or the exposure cannot be used.  The visit's survey (:mod:`.rawio`)
puts the files together.
"""

import math
import warnings
from dataclasses import dataclass

import numpy as np
from astropy.time import Time

from .fitsblocks import _Damage, _read_array, _short, fits_structure

__all__ = ["ExposureRef"]


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
