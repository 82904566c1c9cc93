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
exposure is usable.  Pure functions on arrays, vectorised over pixels; the
inputs are not modified.
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["ReadSummary", "untrusted_reads", "clipped_reads", "wrapped_reads",
           "summarize_reads"]


def _reads(reads):
    r = np.asarray(reads, dtype=float)
    if r.ndim != 3 or r.shape[0] < 2:
        raise ParameterError(f"reads must have shape (n_reads >= 2, ny, nx); got {r.shape}")
    return r


def wrapped_reads(reads, span):
    """True for each read at or after a drop of more than ``span / 2`` ADU.

    Parameters
    ----------
    reads : array_like of shape (n_reads, ny, nx)
        Cumulative reads, ADU.  NaN reads are never marked.
    span : float
        Span of the integer storage in ADU (``2**bits * |BSCALE|``); 0 or
        less for floating-point storage (nothing is marked).

    Returns
    -------
    ndarray of bool, shape of ``reads``
    """
    r = _reads(reads)
    if not span > 0:
        return np.zeros(r.shape, bool)
    with np.errstate(invalid="ignore"):
        drop = np.diff(r, axis=0) < -0.5 * float(span)
    after = np.cumsum(drop, axis=0, dtype=np.int32) > 0
    return np.concatenate([np.zeros((1,) + r.shape[1:], bool), after], axis=0)


def clipped_reads(reads, level=None):
    """True for reads that repeat their pixel's highest value in consecutive reads.

    Parameters
    ----------
    reads : array_like of shape (n_reads, ny, nx)
        Cumulative reads, ADU.
    level : float or array_like of shape (ny, nx), optional
        Only tops at or above this value (ADU) count; default every top
        (right for floating-point storage).

    Returns
    -------
    ndarray of bool, shape of ``reads``
        Every read at the top value of a pixel whose top repeats.
    """
    r = _reads(reads)
    finite = np.isfinite(r)
    top = np.max(np.where(finite, r, -np.inf), axis=0)
    at = finite & (r == top)
    repeated = np.any(at[1:] & at[:-1], axis=0)
    if level is not None:
        repeated &= top >= np.broadcast_to(np.asarray(level, float), top.shape)
    return at & repeated


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
    return np.cumsum(bad, axis=0, dtype=np.int32) > 0


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
    finite = np.isfinite(r)
    with np.errstate(invalid="ignore"):
        sat = (r - np.asarray(bias, float)) >= np.asarray(saturation, float)
    clip = clipped_reads(r, clip_level)
    wrap = wrapped_reads(r, span)
    untrusted = np.cumsum(sat | clip | wrap, axis=0, dtype=np.int32) > 0
    good = finite & ~untrusted
    n_good = good.sum(axis=0)
    any_finite = finite.any(axis=0)
    if any_finite.any():
        bad_everywhere = np.all(untrusted[:, any_finite], axis=1)
        first = int(np.argmax(bad_everywhere)) if bad_everywhere.any() else r.shape[0]
    else:
        first = r.shape[0]
    return ReadSummary(n_pixels=int(r.shape[1] * r.shape[2]),
                       n_not_finite=int((~any_finite).sum()),
                       n_saturated=int(sat.any(axis=0).sum()), n_clipped=int(clip.any(axis=0).sum()),
                       n_wrapped=int(wrap.any(axis=0).sum()), n_usable=int((n_good >= 2).sum()),
                       first_untrusted=first)
