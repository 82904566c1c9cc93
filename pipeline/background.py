"""Sky background of a calibrated frame, with its own error.

Two estimators, chosen by ``method``:

* ``"rowcol"`` - a column profile: per column, a sigma-clipped mean of the
  rows away from the trace, smoothed along the dispersion axis with a boxcar,
  optionally plus a low-order polynomial in the row index fitted to the
  residual row means.  Cost: one sort of the frame and a few passes over
  it, O(ny nx log ny) (see :func:`clipped_mean`); about 0.6 ms for
  100 x 180 pixels.
* ``"2d"`` - :class:`photutils.background.Background2D` with
  :class:`astropy.stats.SigmaClip` on meshes, with a source mask from
  :func:`photutils.segmentation.detect_sources` (dilated) joined to the
  caller's.  Cost: tens of ms per frame; memory a few copies of the frame.

Masks are boolean, True = do not use.  The clipped means live in
:mod:`lightledger.pipeline.clipping`, the source masks in
:mod:`lightledger.pipeline.sourcemask`; both are re-exported here.
"""

from dataclasses import dataclass

import numpy as np

from . import mask as dq
from .clipping import _clipped_mean, _clipped_mean_columns, clipped_mean  # noqa: F401 (re-exported)
from .errors import AllMaskedError, ParameterError
from .sourcemask import (TraceMask, _image_and_bad, detect_source_mask,  # noqa: F401 (re-exported)
                         source_mask_from_rows, trace_source_mask)

__all__ = ["BackgroundEstimate", "TraceMask", "estimate_background", "source_mask_from_rows",
           "trace_source_mask", "detect_source_mask", "clipped_mean", "METHODS"]

#: Allowed values of ``method`` in :func:`estimate_background`.
METHODS = ("rowcol", "2d")


@dataclass(frozen=True)
class BackgroundEstimate:
    """Result of :func:`estimate_background`.

    Attributes
    ----------
    background : ndarray of shape (ny, nx), float64
        Background per pixel, in the units of the image.
    variance : ndarray of shape (ny, nx), float64
        Variance of the background estimate itself (not of a pixel).
    level : float
        Median of ``background``.
    bits : ndarray of shape (ny, nx), uint16
        SKY_CLIPPED where a pixel offered to the estimator was rejected
        by the clipping.
    n_used : int
        Number of pixels that entered the estimate.
    """

    background: np.ndarray
    variance: np.ndarray
    level: float
    bits: np.ndarray
    n_used: int


def _boxcar_fill(values, variances, width):
    """Boxcar mean over a window of ``width`` columns, skipping NaN entries."""
    ok = np.isfinite(values) & np.isfinite(variances)
    v = np.where(ok, values, 0.0)
    e = np.where(ok, variances, 0.0)
    w = max(int(width), 1)
    kern = np.ones(w)
    cnt = np.convolve(ok.astype(float), kern, mode="same")
    sv = np.convolve(v, kern, mode="same")
    se = np.convolve(e, kern, mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        return sv / cnt, se / cnt ** 2


def _rowcol(img, bad, sigma, maxiters, smooth_columns, row_order):
    ny, nx = img.shape
    # bad holds the non-finite pixels already
    mean, var_mean, kept = _clipped_mean(img, bad, 0, sigma, maxiters)
    if not np.isfinite(mean).any():
        raise AllMaskedError("estimate_background: no unmasked pixel in any column; loosen source_mask or mask")
    col, col_var = _boxcar_fill(mean, var_mean, smooth_columns)
    if not np.all(np.isfinite(col)):
        # columns beyond the reach of the boxcar: nearest estimated column
        good = np.flatnonzero(np.isfinite(col))
        idx = good[np.clip(np.searchsorted(good, np.arange(nx)), 0, good.size - 1)]
        col, col_var = col[idx], col_var[idx]
    bkg = np.broadcast_to(col, (ny, nx)).copy()
    var = np.broadcast_to(col_var, (ny, nx)).copy()
    # the median of a map whose rows all equal col is the median of col: it holds each
    # value ny times, so its middle ranks fall on col's middle values (col is finite here)
    srt = np.sort(col)
    level = float(0.5 * (srt[(nx - 1) // 2] + srt[nx // 2]))
    if row_order and row_order > 0:
        resid = img - col
        rmean, rvar, rkept = clipped_mean(resid, ~kept, axis=1, sigma=sigma, maxiters=maxiters)
        ok = np.isfinite(rmean) & np.isfinite(rvar) & (rvar > 0)
        if ok.sum() > row_order + 1:
            y = np.arange(ny, dtype=float)
            yn = (y - 0.5 * (ny - 1)) / max(0.5 * (ny - 1), 1.0)
            A = np.vander(yn, row_order + 1, increasing=True)
            wgt = 1.0 / rvar[ok]
            Aw = A[ok] * wgt[:, None]
            cov = np.linalg.inv(A[ok].T @ Aw)
            coef = cov @ (Aw.T @ rmean[ok])
            bkg += (A @ coef)[:, None]
            var += np.einsum("ij,jk,ik->i", A, cov, A)[:, None]
            kept = kept & rkept
            level = float(np.nanmedian(bkg))
    return bkg, var, kept, level


def _two_d(img, bad, sigma, maxiters, box_size, filter_size):
    from astropy.stats import SigmaClip
    from photutils.background import Background2D, MedianBackground, StdBackgroundRMS

    clip = SigmaClip(sigma=sigma, maxiters=maxiters)
    ny, nx = img.shape
    # A box never taller or wider than the image; on a short subarray whose middle rows hold
    # the source a box keeps less than half its pixels, so such boxes are still used.
    box = (min(int(box_size[0]), ny), min(int(box_size[1]), nx))
    try:
        b2d = Background2D(np.where(bad, 0.0, img), box, mask=bad, filter_size=filter_size,
                           sigma_clip=clip, bkg_estimator=MedianBackground(),
                           bkg_rms_estimator=StdBackgroundRMS(), exclude_percentile=90.0)
    except ValueError as exc:
        raise AllMaskedError(f"background_method '2d': too few unmasked pixels in boxes of "
                             f"{box[0]}x{box[1]} pixels ({exc}); use 'rowcol'") from None
    bkg = np.asarray(b2d.background, dtype=float)
    rms = np.asarray(b2d.background_rms, dtype=float)
    npix = np.asarray(b2d.n_pixels_map, dtype=float)
    # median of n normal values: variance (pi / 2) sigma**2 / n (common practice)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where(npix > 0, 0.5 * np.pi * rms ** 2 / np.maximum(npix, 1.0), np.nan)
    with np.errstate(invalid="ignore"):
        kept = ~bad & ~(np.abs(img - bkg) > sigma * rms)
    return bkg, var, kept


def estimate_background(image, *, mask=None, source_mask=None, method="rowcol", sigma=3.0,
                        maxiters=5, smooth_columns=9, row_order=0, box_size=(25, 30),
                        filter_size=(3, 1), detect=True, detect_sigma=3.0, detect_npixels=5,
                        dilate_size=5):
    """Sky background of a frame and the variance of that estimate.

    Mask contract: pixels where ``mask`` (bad pixels) or ``source_mask``
    (the trace) is True, and non-finite pixels, are not used; pixels offered
    to the estimator and rejected by its sigma clipping get
    SKY_CLIPPED.  The inputs are not modified.

    Parameters
    ----------
    image : array_like of shape (ny, nx)
        Calibrated frame, electrons (or any unit; the result has the same).
    mask : array_like of bool, shape (ny, nx), optional
        True = bad pixel.
    source_mask : array_like of bool, shape (ny, nx), optional
        True = source pixel to avoid.
    method : {"rowcol", "2d"}
        See the module docstring for cost and model.
    sigma, maxiters : float, int
        Clipping threshold (sigma) and iterations.
    smooth_columns : int
        "rowcol": boxcar width of the column profile, columns.
    row_order : int
        "rowcol": order of a polynomial in the row index fitted to the row
        means of the residual (0 = none).
    box_size, filter_size : tuple of int
        "2d": mesh size (rows, columns) and median-filter size in meshes;
        the default filters along rows only, so that the background's
        structure along the dispersion axis is not flattened.
    detect : bool
        "2d": add sources found by :func:`detect_source_mask` to the mask.
    detect_sigma, detect_npixels, dilate_size
        Passed to :func:`detect_source_mask`.

    Returns
    -------
    BackgroundEstimate

    Raises
    ------
    ParameterError
        Unknown ``method`` or wrong shapes.
    AllMaskedError
        No pixel left for the estimate.

    Notes
    -----
    "rowcol": the column mean ``m_x`` of ``n_x`` kept pixels with sample
    standard deviation ``s_x`` has variance ``s_x**2 / n_x``; the boxcar of
    ``w`` columns averages independent means, so
    ``var b_x = sum_j var m_j / w**2`` (the sum over the ``w`` columns with an
    estimate).  A row polynomial fitted by weighted least squares with
    covariance ``Cov`` adds ``a(y)^T Cov a(y)`` with ``a(y)`` the row's
    design vector.

    "2d": each mesh value is a clipped median; for a normal sample the median
    of ``n`` values has variance ``(pi / 2) sigma**2 / n`` (common practice),
    evaluated with photutils' interpolated ``background_rms`` and
    ``n_pixels_map``.  The median filter over meshes and the interpolation
    average neighbouring meshes, which lowers the noise; structure on the
    scale of a mesh (or, for "rowcol", of the boxcar and near the first and
    last columns, where the boxcar is one-sided) adds a model error that is
    not included.

    The "2d" method is the mesh-of-clipped-medians background of Bertin &
    Arnouts 1996, computed by the design card's photutils (Background2D with
    astropy's sigma clipping).

    References
    ----------
    Bertin, E. & Arnouts, S. 1996, A&AS 117, 393 (background from a mesh of
    clipped medians, median-filtered and interpolated; from memory).
    """
    if method not in METHODS:
        raise ParameterError(f"method must be one of {METHODS}; got {method!r}")
    img, bad = _image_and_bad(image, mask)
    offered = ~bad
    if source_mask is not None:
        sm = np.asarray(source_mask, dtype=bool)
        if sm.shape != img.shape:
            raise ParameterError(f"source_mask must have shape {img.shape}; got {sm.shape}")
        bad = bad | sm
    if method == "2d" and detect:
        bad = bad | detect_source_mask(img, mask=bad, n_sigma=detect_sigma,
                                       n_pixels=detect_npixels, dilate_size=dilate_size)
    offered &= ~bad
    if not offered.any():
        raise AllMaskedError("estimate_background: every pixel is masked by mask or source_mask")
    if method == "rowcol":
        bkg, var, kept, level = _rowcol(img, bad, sigma, maxiters, smooth_columns, int(row_order))
    else:
        bkg, var, kept = _two_d(img, bad, sigma, maxiters, box_size, filter_size)
        level = float(np.nanmedian(bkg))
    bits = (offered & ~kept).view(np.uint8).astype(dq.MASK_DTYPE)
    bits *= dq.MASK_DTYPE(dq.SKY_CLIPPED)  # 0 or the one bit
    return BackgroundEstimate(background=bkg, variance=var, level=level,
                              bits=bits, n_used=int(np.count_nonzero(kept)))
