"""Reference files of an instrument profile, read, checked and cut to a visit's subarray.

:func:`check_references` is the validation pass's look at the reference
files: each must be a readable FITS file with a numeric array of the
documented dimensions and the profile's ``detector.full_shape`` in its
primary HDU, and the visit's subarray must lie inside it.  Pixels that no
calibration can use are counted inside the subarray and reported as one
warning per file:

* bias, dark, non-linearity: a value that is NaN or infinite;
* flat: NaN or infinite, zero or negative, or outside a tenth to ten times
  the flat's median (a pixel answering below a tenth or above ten times the
  typical response is dead or damaged, not flat-field structure: common
  practice, from memory);
* bad-pixel map: a value that is not a finite number.

Those pixels are added to the bad-pixel map that calibration uses, so they
carry the UNUSABLE bit.  A reference with no usable pixel in the subarray is
an error.
"""

import warnings
from dataclasses import dataclass

import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.detector import cut_subarray, flat_from_cube
from lightledger.pipeline.errors import InputFileError, ParameterError
from lightledger.pipeline.wavelength import column_wavelengths, reference_column

from .problems import Problems

__all__ = ["References", "load_references", "load_throughput", "check_references",
           "FLAT_LIMITS"]

#: A flat value outside (low, high) times the flat's median marks a dead or damaged pixel.
FLAT_LIMITS = (0.1, 10.0)

_ROLES = (("bias", "bias", (2,)), ("dark", "dark", (2,)), ("flat", "flat", (2, 3)),
          ("nonlinearity", "nonlinearity", (3,)), ("bad pixels", "bad_pixels", (2,)))


@dataclass(frozen=True)
class References:
    """Reference arrays cut to the subarray: bias (ADU), dark (e-/s), flat, nonlinearity, bad.

    ``bad_pixels`` is nonzero where the bad-pixel file says so or where
    another reference file is unusable (see the module notes);
    ``unusable`` counts unusable pixels per reference role (whether or not
    the bad-pixel map lists them).
    """

    bias: np.ndarray
    dark: np.ndarray
    flat: np.ndarray
    nonlinearity: np.ndarray
    bad_pixels: np.ndarray
    unusable: dict = None


def _primary(path, role, ndim):
    """The primary array of a reference file as float (int64 for the bad-pixel map)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with fits.open(path, memmap=False) as hdul:
                data = hdul[0].data
                data = None if data is None else np.array(data)
    except Exception as exc:     # astropy on a damaged file: OSError, VerifyError, TypeError...
        text = " ".join(str(exc).split())[:120]
        raise InputFileError(f"{path}: cannot read the {role} reference file ({text})") from None
    if data is None:
        raise InputFileError(f"{path}: the {role} reference file has no data in its primary HDU")
    if data.dtype.kind not in "biuf":
        raise InputFileError(f"{path}: the {role} reference holds {data.dtype} values, not numbers")
    if data.ndim not in ndim:
        raise InputFileError(f"{path}: the {role} reference must be "
                             f"{' or '.join(f'{n}-D' for n in ndim)}, found {data.ndim}-D")
    return np.asarray(data, dtype=np.float64)


def _flat_bad(flat):
    """Pixels of an evaluated flat that no calibration can use."""
    with np.errstate(invalid="ignore"):
        bad = ~np.isfinite(flat) | (flat <= 0)
        good = flat[~bad]
        if good.size:
            median = float(np.median(good))
            bad |= (flat < FLAT_LIMITS[0] * median) | (flat > FLAT_LIMITS[1] * median)
    return bad


def _load(profile, shape, origin, source_x, problems):
    files = profile.files
    full = tuple(profile.full_shape)
    arrays = {}
    for role, key, ndim in _ROLES:
        try:
            data = _primary(files[key], role, ndim)
        except InputFileError as exc:
            problems.error("", str(exc))
            continue
        if data.shape[-2:] != full:
            problems.error(files[key], f"the {role} reference is {data.shape[-2:]}, but the "
                                       f"profile's detector.full_shape is {list(full)}")
            continue
        try:
            arrays[key] = cut_subarray(data, origin, shape)
        except ParameterError:
            problems.error(files[key], f"the visit's subarray (origin x, y = {tuple(origin)}, "
                                       f"{shape[0]} rows x {shape[1]} columns, from the raw "
                                       f"files' SUBORIGX/SUBORIGY) does not fit in this "
                                       f"{full[0]} x {full[1]} reference")
    if len(arrays) < len(_ROLES):
        return None
    flat = arrays["flat"]
    if flat.ndim == 3:
        if profile.flat_range is None:
            problems.error(profile.path, "the flat is a wavelength cube but "
                                         "flat.wavelength_range is not given")
            return None
        x_ref = reference_column(source_x, profile.column_offset)
        wave = column_wavelengths(np.arange(shape[1]), profile.dispersion, x_ref, origin_x=origin[0])
        flat = flat_from_cube(flat, wave, profile.flat_range)
    bad_file = arrays["bad_pixels"]
    unusable = {
        "bias": ~np.isfinite(arrays["bias"]),
        "dark": ~np.isfinite(arrays["dark"]),
        "flat": _flat_bad(flat),
        "nonlinearity": ~np.all(np.isfinite(arrays["nonlinearity"]), axis=0),
        "bad_pixels": ~np.isfinite(bad_file),
    }
    n = shape[0] * shape[1]
    listed = np.isfinite(bad_file) & (bad_file != 0)      # already in the bad-pixel map
    for key, bad in unusable.items():
        count = int((bad & ~listed).sum())
        if int(bad.sum()) == n:
            problems.error(files[key], f"every pixel of the visit's subarray is unusable in this "
                                       f"{key.replace('_', ' ')} reference "
                                       f"({_what_bad(key)})")
        elif count:
            problems.warning(files[key], f"{count} of {n} pixels of the visit's subarray are "
                                         f"unusable ({_what_bad(key)}) and not in the bad-pixel "
                                         f"map; flagged as bad pixels")
    any_bad = np.logical_or.reduce(list(unusable.values()))
    bad_pixels = np.where(np.isfinite(bad_file), bad_file, 1).astype(np.int64)
    bad_pixels[any_bad] = 1
    if int(((bad_pixels != 0)).sum()) == n and not any(int(b.sum()) == n for b in unusable.values()):
        problems.error(files["bad_pixels"], "every pixel of the visit's subarray is marked bad")
    return References(bias=arrays["bias"], dark=arrays["dark"], flat=flat,
                      nonlinearity=arrays["nonlinearity"], bad_pixels=bad_pixels,
                      unusable={k: int(v.sum()) for k, v in unusable.items()})


def _what_bad(key):
    return {"flat": f"NaN, zero, negative, or outside {FLAT_LIMITS[0]:g} to {FLAT_LIMITS[1]:g} "
                    f"times the median"}.get(key, "NaN or infinite")


def check_references(profile, shape, origin, source_x, problems):
    """Read every reference file, check it and cut it to the subarray.

    Parameters
    ----------
    profile : lightledger.tasks.config.Profile
    shape : tuple of int (ny, nx)
    origin : tuple of int (x, y)
    source_x : float
    problems : Problems
        Receives an error per unusable file and a warning per file with
        unusable pixels (naming the count).

    Returns
    -------
    References or None
        None when a file is unusable.
    """
    return _load(profile, tuple(shape), tuple(origin), float(source_x), problems)


_CACHE = {}


def load_references(profile, shape, origin, source_x):
    """Reference arrays for a subarray of ``shape`` (ny, nx) at ``origin`` (x, y).

    Cached per process while the profile file is unchanged.

    Raises
    ------
    InputFileError
        Every problem of the reference files, one per line.
    """
    st = profile.path.stat()
    key = (str(profile.path), st.st_mtime_ns, tuple(shape), tuple(origin), float(source_x))
    if key not in _CACHE:
        if len(_CACHE) > 4:
            _CACHE.clear()
        problems = Problems()
        refs = _load(profile, tuple(shape), tuple(origin), float(source_x), problems)
        problems.raise_errors(InputFileError)
        _CACHE[key] = refs
    return _CACHE[key]


def load_throughput(profile, problems=None):
    """(wavelength_um, throughput) arrays from the profile's throughput table, or None.

    The table needs columns ``wavelength`` (um, increasing, positive) and
    ``throughput`` (finite, not negative, not all zero).
    """
    path = profile.files.get("throughput")
    if path is None:
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = Table.read(path, format="ascii.ecsv")
        wave = np.asarray(table["wavelength"], float)
        tput = np.asarray(table["throughput"], float)
    except KeyError as exc:
        message = f"{path}: the throughput table has no column {exc}"
    except Exception as exc:
        message = f"{path}: cannot read the throughput table ({' '.join(str(exc).split())[:120]})"
    else:
        if wave.size < 2 or not np.all(np.isfinite(wave)) or np.any(np.diff(wave) <= 0) \
                or wave[0] <= 0:
            message = f"{path}: column wavelength must be positive, finite and increasing"
        elif not np.all(np.isfinite(tput)) or np.any(tput < 0) or not np.any(tput > 0):
            message = f"{path}: column throughput must be finite, >= 0 and not all zero"
        else:
            return wave, tput
    if problems is None:
        raise InputFileError(message)
    problems.error("", message)
    return None
