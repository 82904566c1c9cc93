"""Reading raw visits in the project's raw exposure layout.

A visit is a directory of FITS files.  Each file holds one exposure (READS of
shape ``(n_reads, ny, nx)``) or a run of consecutive exposures with one read
pattern (``(n_exp, n_reads, ny, nx)`` with a STARTOFF extension).  The primary
header carries DATE-BEG, TIMESYS, XPOSURE, SCANVEL and optionally OBSGEO-X/Y/Z,
SUBORIGX/Y and INSTPROF; the README's "Raw exposure layout" section is the full
description.  Every keyword and extension name goes through the instrument
profile, which may rename them.

:func:`inventory` reads headers only and lists every exposure in start-time
order; :func:`read_exposure` then reads one exposure's reads at a time through
a memory map, so no stage needs a whole visit in memory.
"""

import hashlib
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time

from lightledger.pipeline.errors import InputFileError

__all__ = ["ExposureRef", "inventory", "read_exposure", "read_exposures", "sha256_of",
           "inventory_table", "refs_from_table"]


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
        MJD (UTC) of the zero read.
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


def _header_value(header, key, path, kind, required=True, default=None):
    if key not in header:
        if required:
            raise InputFileError(f"{path}: primary header has no {key} keyword")
        return default
    value = header[key]
    try:
        if kind is str:
            if not isinstance(value, str):
                raise TypeError
            return value
        if isinstance(value, bool):
            raise TypeError
        return kind(value)
    except (TypeError, ValueError):
        raise InputFileError(f"{path}: keyword {key} must be {kind.__name__}, "
                             f"found {value!r}") from None


def _extension(hdul, name, path, required=True):
    try:
        return hdul[name]
    except KeyError:
        if required:
            raise InputFileError(f"{path}: no {name} extension") from None
        return None


def _file_exposures(path, profile):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            return _read_headers(path, profile)
        except InputFileError:
            if any("header" in str(w.message).lower() or "truncated" in str(w.message).lower()
                   for w in caught):
                raise InputFileError(f"{path}: the file is truncated or its headers are damaged") from None
            raise


def _read_headers(path, profile):
    kw, ext = profile.keyword, profile.extension
    try:
        hdul = fits.open(path, memmap=True, lazy_load_hdus=True)
    except (OSError, ValueError) as exc:
        raise InputFileError(f"{path}: not a readable FITS file ({exc})") from None
    with hdul:
        hdr = hdul[0].header
        date = _header_value(hdr, kw("DATE-BEG"), path, str)
        timesys = _header_value(hdr, kw("TIMESYS"), path, str, required=False, default="UTC")
        if timesys.strip().upper() != "UTC":
            raise InputFileError(f"{path}: {kw('TIMESYS')} is {timesys!r}; only UTC is supported")
        try:
            start = Time(date, format="isot", scale="utc")
        except ValueError:
            raise InputFileError(f"{path}: {kw('DATE-BEG')} {date!r} is not an ISO-8601 time") from None
        xposure = _header_value(hdr, kw("XPOSURE"), path, float)
        scanvel = _header_value(hdr, kw("SCANVEL"), path, float)
        origin = (_header_value(hdr, kw("SUBORIGX"), path, int, required=False, default=0),
                  _header_value(hdr, kw("SUBORIGY"), path, int, required=False, default=0))
        geo = [_header_value(hdr, kw(k), path, float, required=False)
               for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z")]
        if any(g is None for g in geo) and not all(g is None for g in geo):
            raise InputFileError(f"{path}: OBSGEO-X/Y/Z must be given all three or none")
        obsgeo = None if geo[0] is None else tuple(geo)

        reads_hdu = _extension(hdul, ext("READS"), path)
        shape = tuple(reads_hdu.shape)
        if len(shape) not in (3, 4):
            raise InputFileError(f"{path}: {ext('READS')} must be 3-D or 4-D, found {len(shape)}-D")
        read_times = np.asarray(_extension(hdul, ext("READTIME"), path).data, dtype=float).ravel()
        n_reads = shape[-3]
        if read_times.size != n_reads:
            raise InputFileError(f"{path}: {ext('READTIME')} has {read_times.size} values for "
                                 f"{n_reads} reads")
        if read_times[0] != 0 or np.any(np.diff(read_times) <= 0):
            raise InputFileError(f"{path}: {ext('READTIME')} must start at 0 and increase")
        if n_reads < 2:
            raise InputFileError(f"{path}: an exposure needs at least 2 reads, found {n_reads}")
        if len(shape) == 4:
            off_hdu = _extension(hdul, ext("STARTOFF"), path)
            offsets = np.asarray(off_hdu.data, dtype=float).ravel()
            if offsets.size != shape[0]:
                raise InputFileError(f"{path}: {ext('STARTOFF')} has {offsets.size} values for "
                                     f"{shape[0]} exposures")
            indices = range(shape[0])
        else:
            offsets, indices = np.zeros(1), [-1]
    refs = []
    for i, offset in zip(indices, offsets):
        refs.append(ExposureRef(file=str(path), index=int(i),
                                start_mjd=float(start.mjd + offset / 86400.0),
                                read_times=tuple(float(t) for t in read_times),
                                exposure_time=xposure, scan_velocity=scanvel, origin=origin,
                                obsgeo=obsgeo, shape=tuple(int(s) for s in shape[-3:])))
    return refs


def inventory(raw_dir, profile):
    """List every exposure of a visit in start-time order, reading headers only.

    Parameters
    ----------
    raw_dir : str or Path
        Directory of ``*.fits`` files.
    profile : lightledger.tasks.config.Profile
        Supplies renamed keywords and extensions.

    Returns
    -------
    refs : list of ExposureRef

    Raises
    ------
    InputFileError
        For an empty directory, an unreadable file, a missing keyword or
        extension, or exposures of different shapes.
    """
    raw_dir = Path(raw_dir)
    files = sorted(raw_dir.glob("*.fits"))
    if not files:
        raise InputFileError(f"{raw_dir}: no *.fits files in the visit directory")
    refs = [ref for path in files for ref in _file_exposures(path, profile)]
    shapes = {ref.shape[1:] for ref in refs}
    if len(shapes) > 1:
        raise InputFileError(f"{raw_dir}: exposures have different frame shapes {sorted(shapes)}")
    origins = {ref.origin for ref in refs}
    if len(origins) > 1:
        raise InputFileError(f"{raw_dir}: exposures have different subarray origins {sorted(origins)}")
    refs.sort(key=lambda r: (r.start_mjd, r.file, r.index))
    return refs


def read_exposure(ref, profile):
    """The reads of one exposure, in ADU.

    Parameters
    ----------
    ref : ExposureRef
    profile : lightledger.tasks.config.Profile

    Returns
    -------
    reads : ndarray of shape (n_reads, ny, nx), float64
    """
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with fits.open(ref.file, memmap=True) as hdul:
                data = hdul[profile.extension("READS")].data
                block = data[ref.index] if ref.index >= 0 else data
                reads = np.array(block, dtype=np.float64)
    except (OSError, ValueError, KeyError, TypeError, IndexError) as exc:
        raise InputFileError(f"{ref.file}: cannot read the {profile.extension('READS')} data "
                             f"of exposure {max(ref.index, 0)} ({exc})") from None
    if reads.shape != ref.shape:
        raise InputFileError(f"{ref.file}: READS changed shape since the inventory")
    return reads


def sha256_of(path, block=1 << 20):
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(block), b""):
            digest.update(chunk)
    return digest.hexdigest()


def inventory_table(refs):
    """The inventory as an astropy Table (one row per exposure)."""
    n_reads = max(len(r.read_times) for r in refs)
    times = np.full((len(refs), n_reads), np.nan)
    for i, r in enumerate(refs):
        times[i, :len(r.read_times)] = r.read_times
    geo = np.array([r.obsgeo if r.obsgeo is not None else (np.nan,) * 3 for r in refs], float)
    table = Table()
    table["exposure"] = np.arange(len(refs))
    table["file"] = [Path(r.file).name for r in refs]
    table["index"] = [r.index for r in refs]
    table["start_mjd_utc"] = [r.start_mjd for r in refs]
    table["start_mjd_utc"].unit = "d"
    table["exposure_time"] = [r.exposure_time for r in refs]
    table["exposure_time"].unit = "s"
    table["scan_velocity"] = [r.scan_velocity for r in refs]
    table["read_times"] = times
    table["read_times"].unit = "s"
    table["obsgeo"] = geo
    table["obsgeo"].unit = "m"
    table["origin_x"] = [r.origin[0] for r in refs]
    table["origin_y"] = [r.origin[1] for r in refs]
    table["shape"] = np.array([r.shape for r in refs], dtype=np.int32)
    return table


def refs_from_table(table, raw_dir):
    """Rebuild :class:`ExposureRef` objects from :func:`inventory_table`'s table."""
    refs = []
    for row in table:
        times = np.asarray(row["read_times"], float)
        times = times[np.isfinite(times)]
        geo = np.asarray(row["obsgeo"], float)
        refs.append(ExposureRef(file=str(Path(raw_dir) / row["file"]), index=int(row["index"]),
                                start_mjd=float(row["start_mjd_utc"]),
                                read_times=tuple(times), exposure_time=float(row["exposure_time"]),
                                scan_velocity=float(row["scan_velocity"]),
                                origin=(int(row["origin_x"]), int(row["origin_y"])),
                                obsgeo=None if np.isnan(geo).any() else tuple(geo),
                                shape=tuple(int(v) for v in row["shape"])))
    return refs


def read_exposures(refs, profile, dtype=np.float32):
    """The reads of several exposures (a chunk), opening each raw file once.

    Parameters
    ----------
    refs : sequence of ExposureRef
        Exposures of one frame shape, in the order wanted.
    profile : lightledger.tasks.config.Profile
    dtype : numpy dtype, optional
        Of the returned reads.  float32 (the default) holds raw ADU exactly up
        to 2**24.

    Returns
    -------
    reads : ndarray of shape (n_exposures, n_reads, ny, nx), ADU
    """
    out = np.empty((len(refs),) + tuple(refs[0].shape), dtype=dtype) if refs else np.empty(0, dtype)
    by_file = {}
    for i, ref in enumerate(refs):
        by_file.setdefault(ref.file, []).append(i)
    name = profile.extension("READS")
    for file, slots in by_file.items():
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                with fits.open(file, memmap=True) as hdul:
                    data = hdul[name].data
                    for i in slots:
                        ref = refs[i]
                        block = data[ref.index] if ref.index >= 0 else data
                        if block.shape != ref.shape:
                            raise InputFileError(f"{file}: READS changed shape since the inventory")
                        out[i] = block
        except (OSError, ValueError, KeyError, TypeError, IndexError) as exc:
            raise InputFileError(f"{file}: cannot read the {name} data ({exc})") from None
    return out
