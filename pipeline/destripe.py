"""Removal of correlated (1/f) read noise as row and column stripes.

Per frame (a read difference or a calibrated image), the median of each row
over the columns outside the source mask, and then the median of each column
over the rows outside it, are taken as the stripe pattern (common practice)
and subtracted relative to the frame's overall masked median, so the
background level is kept.  Cost: two sorts of each frame, O(n ny nx log nx);
a few ms for 7 frames of 100 x 180 pixels.

Masks are boolean, True = pixel not used for the stripe estimate.
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError
from .ramps import masked_median

__all__ = ["DestripeResult", "destripe", "AXES"]

#: Allowed values of ``axes`` in :func:`destripe`.
AXES = ("rows", "columns", "both")


@dataclass(frozen=True)
class DestripeResult:
    """Result of :func:`destripe`.

    Attributes
    ----------
    frames : ndarray of shape (..., ny, nx)
        Destriped frames, float64.
    row_offsets : ndarray of shape (..., ny)
        Subtracted offset of each row (0 where every pixel of the row is masked
        or ``axes`` excludes rows).
    column_offsets : ndarray of shape (..., nx)
        Subtracted offset of each column (after the row correction).
    """

    frames: np.ndarray
    row_offsets: np.ndarray
    column_offsets: np.ndarray


def destripe(frames, source_mask, *, axes="both", mask=None, min_pixels=5):
    """Subtract row and column stripes measured away from the source.

    Mask contract: pixels where ``source_mask`` (True = source to avoid) or
    ``mask`` (True = bad) is True, and non-finite pixels, are not used to
    measure the stripes, but every pixel is corrected.  A row (column) with
    fewer than ``min_pixels`` usable pixels gets no correction.  The inputs
    are not modified.

    Parameters
    ----------
    frames : array_like of shape (ny, nx) or (n_frames, ny, nx)
        Read differences or images, any unit.
    source_mask : array_like of bool, shape (ny, nx) or that of ``frames``
        True = source pixel.
    axes : {"rows", "columns", "both"}
        Which stripes to remove; "both" does rows first, then columns.
    mask : array_like of bool, optional
        Bad pixels, broadcast like ``source_mask``.
    min_pixels : int
        Minimum usable pixels per row or column.

    Returns
    -------
    DestripeResult

    Raises
    ------
    ParameterError
        Unknown ``axes`` or shapes that do not broadcast.

    Notes
    -----
    The correction of row ``y`` is ``median_x(F[y, x]) - median(F)`` over
    usable pixels.  Subtracting an estimate from ``n`` pixels adds its own
    noise, ``(pi / 2) sigma**2 / n`` per pixel for white noise ``sigma``
    (variance of a median of normal values, common practice); with ``n``
    of order 100 this is below 2 per cent of the pixel variance and is not
    propagated.  Column corrections also remove any column structure of the
    background outside the source (e.g. a dispersed sky); apply a background
    estimate afterwards.
    """
    if axes not in AXES:
        raise ParameterError(f"axes must be one of {AXES}; got {axes!r}")
    f = np.asarray(frames, dtype=float)
    if f.ndim not in (2, 3):
        raise ParameterError(f"frames must have shape (ny, nx) or (n_frames, ny, nx); got {f.shape}")
    try:
        bad = np.broadcast_to(np.asarray(source_mask, dtype=bool), f.shape)
        if mask is not None:
            bad = bad | np.broadcast_to(np.asarray(mask, dtype=bool), f.shape)
    except ValueError:
        raise ParameterError(f"source_mask and mask must broadcast to frames' shape {f.shape}") from None
    bad = bad | ~np.isfinite(f)
    out = f.copy()
    flat = out.reshape(out.shape[:-2] + (-1,))
    level, _ = masked_median(flat, bad.reshape(flat.shape), axis=-1)
    level = np.nan_to_num(level)
    row_off = np.zeros(f.shape[:-1])
    col_off = np.zeros(f.shape[:-2] + (f.shape[-1],))
    if axes in ("rows", "both"):
        med, n = masked_median(out, bad, axis=-1)
        row_off = np.where(n >= min_pixels, med - level[..., None], 0.0)
        out -= row_off[..., :, None]
    if axes in ("columns", "both"):
        med, n = masked_median(out, bad, axis=-2)
        col_off = np.where(n >= min_pixels, med - level[..., None], 0.0)
        out -= col_off[..., None, :]
    return DestripeResult(frames=out, row_offsets=row_off, column_offsets=col_off)
