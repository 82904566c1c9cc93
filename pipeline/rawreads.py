"""Reads that cannot be trusted: saturated, clipped, wrapped around, not finite.

Cumulative non-destructive reads of a pixel grow with the charge collected
(apart from read noise) until the pixel saturates.  Three kinds of read break
that and must leave the ramp like a saturated read (with every later read of
the pixel):

* **saturated**: at or above the saturation level, ADU above bias (a read
  sitting exactly at the level is saturated: electronics that clip write the
  level itself);
* **clipped**: the read repeats its pixel's highest value exactly in two or
  more consecutive reads.  Read noise makes an exact repeat of a
  floating-point value practically impossible, so a flat top is a clip of
  the electronics or of the storage, wherever it sits (for integer storage,
  where small values repeat by chance, only tops above a given level count);
* **wrapped**: integer storage overflowed, so the stored value dropped by
  about the storage's span (2**bits ADU): a drop between consecutive reads of
  more than half the span cannot be noise.

:func:`untrusted_reads` marks them; :func:`summarize_reads` counts, per
exposure, what the validation pass needs to decide whether any pixel of the
exposure is usable (:func:`summarize_exposures` does so for a block of
exposures at once).  Pure functions on arrays, vectorised over pixels and
over any leading axes (exposures); the inputs are not modified.
"""

from dataclasses import dataclass

import numpy as np

from .arrayops import running_or
from .errors import ParameterError

__all__ = ["ReadSummary", "untrusted_reads", "clipped_reads", "wrapped_reads",
           "summarize_reads", "summarize_exposures"]


def _reads(reads):
    """Reads as a floating-point array (float32 kept, anything else float64), reads on axis -3."""
    r = np.asarray(reads)
    if r.dtype not in (np.float32, np.float64):
        r = r.astype(float)
    if r.ndim < 3 or r.shape[-3] < 2:
        raise ParameterError(f"reads must have shape (..., n_reads >= 2, ny, nx); got {r.shape}")
    return r


def wrapped_reads(reads, span):
    """True for each read at or after a drop of more than ``span / 2`` ADU.

    Parameters
    ----------
    reads : array_like of shape (..., n_reads, ny, nx)
        Cumulative reads, ADU (any leading axes, e.g. exposures).  NaN reads
        are never marked.
    span : float
        Span of the integer storage in ADU (``2**bits * |BSCALE|``); 0 or
        less for floating-point storage (nothing is marked).

    Returns
    -------
    ndarray of bool, shape of ``reads``
    """
    r = _reads(reads)
    out = np.zeros(r.shape, bool)
    if not span > 0:
        return out
    with np.errstate(invalid="ignore"):
        np.less(np.diff(r, axis=-3), -0.5 * float(span), out=out[..., 1:, :, :])
    return running_or(out, axis=-3, out=out)


def clipped_reads(reads, level=None):
    """True for reads that repeat their pixel's highest value in consecutive reads.

    Parameters
    ----------
    reads : array_like of shape (..., n_reads, ny, nx)
        Cumulative reads, ADU (any leading axes, e.g. exposures).
    level : float or array_like of shape (ny, nx), optional
        Only tops at or above this value (ADU) count; default every top
        (right for floating-point storage).

    Returns
    -------
    ndarray of bool, shape of ``reads``
        Every read at the top value of a pixel whose top repeats.
    """
    r = _reads(reads)
    return _clipped(r, np.isfinite(r), level)


def _clipped(r, finite, level):
    """:func:`clipped_reads` of float reads ``r`` whose finite elements are ``finite``."""
    if finite.all():
        top = np.max(r, axis=-3, keepdims=True)
        at = r == top
    else:
        top = np.max(np.where(finite, r, -np.inf), axis=-3, keepdims=True)
        at = r == top
        at &= finite
    repeated = np.any(at[..., 1:, :, :] & at[..., :-1, :, :], axis=-3, keepdims=True)
    if level is not None:
        repeated &= top >= np.asarray(level, float)
    at &= repeated
    return at


def untrusted_reads(reads, *, bias, saturation, span=0.0, clip_level=None):
    """Reads to drop from the ramp like saturated ones (see the module notes).

    Parameters
    ----------
    reads : array_like of shape (n_reads, ny, nx)
        Raw cumulative reads, ADU.
    bias : float or array_like of shape (ny, nx)
        Reset level, ADU.
    saturation : float or array_like of shape (ny, nx)
        Saturation level, ADU above bias.
    span : float
        Integer storage span (:func:`wrapped_reads`); 0 for floating point.
    clip_level : float or array_like, optional
        Passed to :func:`clipped_reads` as ``level`` (ADU, raw); use it for
        integer storage.

    Returns
    -------
    ndarray of bool, shape of ``reads``
        True = not to be used; a read after an untrusted one is untrusted too.
    """
    r = _reads(reads)
    with np.errstate(invalid="ignore"):
        bad = (r - np.asarray(bias, float)) >= np.asarray(saturation, float)
    bad |= clipped_reads(r, clip_level) | wrapped_reads(r, span)
    return running_or(bad, axis=-3, out=bad)


@dataclass(frozen=True)
class ReadSummary:
    """What one exposure's reads hold, pixel by pixel (counts of pixels).

    Attributes
    ----------
    n_pixels : int
    n_not_finite : int
        Pixels with no finite read at all.
    n_saturated : int
        Pixels with a saturated read (at or above the level).
    n_clipped : int
        Pixels with a clipped read.
    n_wrapped : int
        Pixels whose integer storage wrapped around.
    n_usable : int
        Pixels with at least two finite, trusted reads (a slope can be fitted).
    first_untrusted : int
        Earliest read index that is untrusted in every pixel that has a
        finite read (n_reads when none).
    """

    n_pixels: int
    n_not_finite: int
    n_saturated: int
    n_clipped: int
    n_wrapped: int
    n_usable: int
    first_untrusted: int


def summarize_reads(reads, *, bias, saturation, span=0.0, clip_level=None):
    """Count the pixels of an exposure by what their reads allow.

    Parameters as in :func:`untrusted_reads`.

    Returns
    -------
    ReadSummary
    """
    r = _reads(reads)
    if r.ndim != 3:
        raise ParameterError(f"reads must have shape (n_reads >= 2, ny, nx); got {r.shape}")
    return summarize_exposures(r[None], bias=bias, saturation=saturation, span=span,
                               clip_level=clip_level)[0]


def summarize_exposures(reads, *, bias, saturation, span=0.0, clip_level=None):
    """:func:`summarize_reads` of each exposure of a block, computed for the block at once.

    Parameters
    ----------
    reads : array_like of shape (n_exposures, n_reads, ny, nx)
        Raw cumulative reads, ADU; float32 is kept (no float64 copy).
    bias, saturation, span, clip_level
        As in :func:`untrusted_reads`, the same for every exposure of the block.

    Returns
    -------
    list of ReadSummary
        One per exposure, equal to :func:`summarize_reads` of that exposure.
    """
    r = _reads(reads)
    if r.ndim != 4:
        raise ParameterError(f"reads must have shape (n_exposures, n_reads >= 2, ny, nx); got {r.shape}")
    n_exp, n_reads, ny, nx = r.shape
    finite = np.isfinite(r)
    above = np.subtract(r, np.asarray(bias, float), dtype=float)
    with np.errstate(invalid="ignore"):
        sat = np.greater_equal(above, np.asarray(saturation, float))
    del above
    clip = _clipped(r, finite, clip_level)
    untrusted = sat | clip
    if span > 0:
        wrap = wrapped_reads(r, span)
        untrusted |= wrap
    running_or(untrusted, axis=1, out=untrusted)
    good = finite & ~untrusted
    # counts per pixel in bytes (n_reads < 256 in any ramp)
    n_good = good.view(np.uint8).sum(axis=1, dtype=np.int16 if n_reads < 32000 else np.intp)
    any_finite = finite.any(axis=1)                       # (n_exp, ny, nx)
    per_pixel = lambda a: a.reshape(n_exp, -1).sum(axis=1)  # noqa: E731
    n_not_finite = ny * nx - per_pixel(any_finite)
    n_sat, n_clip = per_pixel(sat.any(axis=1)), per_pixel(clip.any(axis=1))
    n_wrap = per_pixel(wrap.any(axis=1)) if span > 0 else np.zeros(n_exp, int)
    n_usable = per_pixel(n_good >= 2)
    # earliest read untrusted in every pixel with a finite read: untrusted reads only grow
    # along a ramp, so read k is untrusted everywhere once the trusted count there is 0
    trusted_left = (~untrusted & any_finite[:, None]).reshape(n_exp, n_reads, -1).any(axis=2)
    out = []
    for i in range(n_exp):
        if n_not_finite[i] == ny * nx:
            first = n_reads
        else:
            where = np.flatnonzero(~trusted_left[i])
            first = int(where[0]) if where.size else n_reads
        out.append(ReadSummary(n_pixels=int(ny * nx), n_not_finite=int(n_not_finite[i]),
                               n_saturated=int(n_sat[i]), n_clipped=int(n_clip[i]),
                               n_wrapped=int(n_wrap[i]), n_usable=int(n_usable[i]),
                               first_untrusted=first))
    return out
