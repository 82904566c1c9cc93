"""Reference files of an instrument profile, read and cut to a visit's subarray."""

from dataclasses import dataclass

import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.detector import cut_subarray, flat_from_cube
from lightledger.pipeline.errors import InputFileError
from lightledger.pipeline.wavelength import column_wavelengths, reference_column

__all__ = ["References", "load_references", "load_throughput"]


@dataclass(frozen=True)
class References:
    """Reference arrays cut to the subarray: bias (ADU), dark (e-/s), flat, nonlinearity, bad."""

    bias: np.ndarray
    dark: np.ndarray
    flat: np.ndarray
    nonlinearity: np.ndarray
    bad_pixels: np.ndarray


def _primary(path, role, ndim):
    try:
        with fits.open(path, memmap=False) as hdul:
            data = hdul[0].data
    except (OSError, ValueError) as exc:
        raise InputFileError(f"{path}: cannot read the {role} reference file ({exc})") from None
    if data is None:
        raise InputFileError(f"{path}: the {role} reference file has no data in its primary HDU")
    if data.ndim not in ndim:
        raise InputFileError(f"{path}: the {role} reference must be "
                             f"{' or '.join(f'{n}-D' for n in ndim)}, found {data.ndim}-D")
    return np.asarray(data, dtype=np.int64 if role == "bad pixels" else np.float64)


_CACHE = {}


def _load(profile, shape, origin, source_x):
    files = profile.files
    full = tuple(profile.full_shape)
    arrays = {}
    for role, key, ndim in (("bias", "bias", (2,)), ("dark", "dark", (2,)), ("flat", "flat", (2, 3)),
                            ("nonlinearity", "nonlinearity", (3,)),
                            ("bad pixels", "bad_pixels", (2,))):
        data = _primary(files[key], role, ndim)
        if data.shape[-2:] != full:
            raise InputFileError(f"{files[key]}: the {role} reference is {data.shape[-2:]}, but the "
                                 f"profile's detector.full_shape is {full}")
        arrays[key] = cut_subarray(data, origin, shape)
    flat = arrays["flat"]
    if flat.ndim == 3:
        if profile.flat_range is None:
            raise InputFileError(f"{profile.path}: the flat is a wavelength cube but "
                                 f"flat.wavelength_range is not given")
        x_ref = reference_column(source_x, profile.column_offset)
        wave = column_wavelengths(np.arange(shape[1]), profile.dispersion, x_ref, origin_x=origin[0])
        flat = flat_from_cube(flat, wave, profile.flat_range)
    return References(bias=arrays["bias"], dark=arrays["dark"], flat=flat,
                      nonlinearity=arrays["nonlinearity"], bad_pixels=arrays["bad_pixels"])


def load_references(profile, shape, origin, source_x):
    """Reference arrays for a subarray of ``shape`` (ny, nx) at ``origin`` (x, y).

    Cached per process while the profile file is unchanged.
    """
    st = profile.path.stat()
    key = (str(profile.path), st.st_mtime_ns, tuple(shape), tuple(origin), float(source_x))
    if key not in _CACHE:
        if len(_CACHE) > 4:
            _CACHE.clear()
        _CACHE[key] = _load(profile, tuple(shape), tuple(origin), float(source_x))
    return _CACHE[key]


def load_throughput(profile):
    """(wavelength_um, throughput) arrays from the profile's throughput table, or None."""
    path = profile.files.get("throughput")
    if path is None:
        return None
    try:
        table = Table.read(path, format="ascii.ecsv")
        return (np.asarray(table["wavelength"], float), np.asarray(table["throughput"], float))
    except Exception as exc:
        raise InputFileError(f"{path}: cannot read the throughput table ({exc})") from None
