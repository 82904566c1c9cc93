"""Reading an exposure's reads from a raw file, through a memory map where the inventory located them.

:func:`read_exposure` reads one exposure, :func:`read_exposures` a chunk of
them with each raw file mapped once; BSCALE, BZERO and BLANK are applied as
the FITS standard says.  The places come from the inventory
(:class:`~.rawfile.ExposureRef`); an inventory that does not record them is
read through astropy.
"""

import math
import warnings

import numpy as np
from astropy.io import fits

from lightledger.pipeline.errors import InputFileError

from .fitsblocks import _BITPIX, _scale_into, _scaled, _short

__all__ = ["read_exposure", "read_exposures"]


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
