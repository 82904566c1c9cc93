"""Masks of the source on a calibrated frame, for the sky estimate to avoid.

Three ways, from cheapest to most general: whole rows given by the caller
(:func:`source_mask_from_rows`), the trace found from the frame's row and
column means (:func:`trace_source_mask`), and compact sources found by
photutils' segmentation (:func:`detect_source_mask`).  Masks are boolean,
True = source.
"""

import warnings
from dataclasses import dataclass

import numpy as np

from .errors import AllMaskedError, ParameterError

__all__ = ["TraceMask", "source_mask_from_rows", "trace_source_mask", "detect_source_mask"]

_MAD_TO_SIGMA = 1.4826  # normal distribution: sigma = 1.4826 MAD (common practice)
_SCALE_SAMPLE = 5000    # trace_source_mask: values used for a robust scale


def _image_and_bad(image, mask):
    """A 2-D float copy of ``image`` and where it is unusable (masked or not finite)."""
    img = np.asarray(image, dtype=float)
    if img.ndim != 2:
        raise ParameterError(f"image must be 2-D (ny, nx); got shape {img.shape}")
    bad = ~np.isfinite(img)
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != img.shape:
            raise ParameterError(f"mask must have shape {img.shape}; got {m.shape}")
        bad = bad | m
    return img, bad


def source_mask_from_rows(shape, rows, *, pad=0):
    """Boolean mask (True = source) of whole rows ``rows[0] .. rows[1]``.

    Parameters
    ----------
    shape : tuple of int (ny, nx)
    rows : tuple of int (row_lo, row_hi) or None
        Inclusive row range of the trace; None gives an empty mask.
    pad : int, keyword-only
        Rows added on each side.

    Returns
    -------
    mask : ndarray of bool, shape (ny, nx)
    """
    ny, nx = (int(v) for v in shape)
    out = np.zeros((ny, nx), dtype=bool)
    if rows is None:
        return out
    try:
        lo, hi = (int(np.floor(float(v))) for v in rows)
    except (TypeError, ValueError):
        raise ParameterError(f"rows must be (row_lo, row_hi) or None; got {rows!r}") from None
    if hi < lo:
        raise ParameterError(f"rows must have row_lo <= row_hi; got {rows!r}")
    lo = max(lo - int(pad), 0)
    hi = min(hi + int(pad), ny - 1)
    if lo <= hi:
        out[lo:hi + 1] = True
    return out


@dataclass(frozen=True)
class TraceMask:
    """Result of :func:`trace_source_mask`.

    Attributes
    ----------
    mask : ndarray of bool, shape (ny, nx)
        True = source pixel (trace rows x source columns, padded, joined with
        compact bright pixels, dilated).
    rows : ndarray of bool, shape (ny,)
        Rows of the trace, padded.
    columns : ndarray of bool, shape (nx,)
        Columns where the trace is detected, padded.
    level : float
        Sigma-clipped median of the image, its units.
    sigma : float
        Robust per-pixel scatter of the image about ``level`` (1.4826 MAD).
    """

    mask: np.ndarray
    rows: np.ndarray
    columns: np.ndarray
    level: float
    sigma: float


def _runs_at_least(flags, min_run):
    """``flags`` with runs of True shorter than ``min_run`` removed (1-D)."""
    f = np.asarray(flags, dtype=bool)
    if min_run <= 1 or not f.any():
        return f.copy()
    start = f & ~np.concatenate([[False], f[:-1]])
    run = np.cumsum(start)                  # run number of each True element (1, 2, ...)
    length = np.bincount(run[f], minlength=run[-1] + 1)
    return f & (length[run] >= min_run)


def _grow_columns(cols, contrast, err, ok, grow_sigma, width):
    """Detected columns joined with the contiguous columns whose running-mean contrast is significant.

    ``contrast`` and ``err`` are the per-column contrast and its white-noise
    error; the running mean over ``width`` columns has error
    ``sqrt(sum err**2) / n``, raised to the robust scatter of the running
    means away from the detected columns when that is larger.  A run of
    significant columns is kept only if it touches a detected column
    (hysteresis thresholding, common practice).
    """
    k = np.ones(width)
    valid = ok & np.isfinite(contrast) & np.isfinite(err)
    n = np.convolve(valid.astype(float), k, mode="same")
    s = np.convolve(np.where(valid, contrast, 0.0), k, mode="same")
    e2 = np.convolve(np.where(valid, err, 0.0) ** 2, k, mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        sm, se = s / n, np.sqrt(e2) / n
    # correlated read noise does not average down along a row: also take the robust scatter
    # of the running means away from the detected columns (1.4826 MAD, common practice)
    away = valid & ~_pad(cols, width) & (n > 0)
    if away.sum() >= 3:
        med = np.median(sm[away])
        se = np.maximum(se, _MAD_TO_SIGMA * np.median(np.abs(sm[away] - med)))
    else:
        med = 0.0
    with np.errstate(invalid="ignore"):
        cand = (n > 0) & (sm - med > grow_sigma * se)
    f = cols | cand
    start = f & ~np.concatenate([[False], f[:-1]])
    run = np.cumsum(start)
    has = np.bincount(run[cols], minlength=run[-1] + 1) > 0
    return f & has[run]


def _pad(flags, pad):
    """1-D dilation of a boolean array by ``pad`` elements on each side."""
    f = np.asarray(flags, dtype=bool)
    if pad <= 0 or not f.any():
        return f.copy()
    c = np.concatenate([[0], np.cumsum(f)])
    n = f.size
    i = np.arange(n)
    lo, hi = np.clip(i - pad, 0, n), np.clip(i + pad + 1, 0, n)
    return (c[hi] - c[lo]) > 0


def trace_source_mask(image, *, rows=None, mask=None, n_sigma=3.0, row_pad=0, column_pad=1,
                      min_run=3, pixel_sigma=5.0, grow_sigma=None, grow_width=9):
    """Two-dimensional source mask of a spectral trace, found from the image itself.

    Mask contract: pixels where ``mask`` (True = bad) is True, and non-finite
    pixels, are ignored by the detection (they may still be inside the
    returned mask).  The inputs are not modified.

    The trace is taken to run along the rows (dispersion along the last
    axis).  With the background level and the per-pixel scatter ``sigma``
    of the image (sigma-clipped median and 1.4826 MAD, common practice):

    1. guess rows: ``rows`` if given, else rows whose mean exceeds the median
       row mean by ``n_sigma`` times the robust scatter of the row means;
    2. source columns: columns whose mean over the guess rows exceeds their
       mean over the other rows by ``n_sigma`` times its white-noise error,
       runs shorter than ``min_run`` dropped, padded by ``column_pad``;
    3. trace rows: as in 1, with the means over the source columns, runs
       shorter than ``min_run`` dropped, padded by ``row_pad`` (the guess rows
       if none is found);
    2b. with ``grow_sigma``: the source columns are extended into the
       contiguous columns where the running mean of that contrast over
       ``grow_width`` columns exceeds ``grow_sigma`` times its error (the
       larger of the white-noise error and the robust scatter of such means
       away from the trace), so the faint ends of the spectrum, below the
       single-column threshold, are covered too;
    4. the mask is trace rows x source columns (whole trace rows if no column
       is found), joined with compact bright pixels - a 3 x 3 mean above
       ``pixel_sigma`` times the robust scatter of such means (never below
       ``sigma / 3``) - dilated by ``row_pad`` rows and ``column_pad``
       columns.

    Parameters
    ----------
    image : array_like of shape (ny, nx)
        A collapsed exposure, e.g. the last read minus the zero read, any unit.
    rows : tuple of int (row_lo, row_hi), optional
        Inclusive guess of the trace rows.
    mask : array_like of bool, shape (ny, nx), optional
        True = bad pixel.
    n_sigma : float
        Detection threshold of rows and columns, sigma.
    row_pad, column_pad : int
        Padding in rows and columns.
    min_run : int
        Shortest run of detected rows or columns kept (drops single cosmic
        rays).
    pixel_sigma : float or None
        Threshold of the compact bright pixels, sigma (None = none).
    grow_sigma : float or None
        Threshold of the column growth of step 2b, sigma (None = no growth).
    grow_width : int
        Columns of the running mean of step 2b (>= 1; 1 = no growth).

    Returns
    -------
    TraceMask

    Raises
    ------
    ParameterError
        Wrong shapes or negative padding.
    AllMaskedError
        No usable pixel.

    Notes
    -----
    The mean of ``n`` pixels of white scatter ``sigma`` has error ``sigma /
    sqrt(n)``, so a column's contrast between ``n_in`` trace and ``n_out``
    other pixels has error ``sigma sqrt(1 / n_in + 1 / n_out)``; a 3 x 3
    mean has error ``sigma / 3``.  Row means and box means also carry read
    noise correlated along the readout (1/f), which does not average down,
    so their thresholds use their own robust scatter (never below the
    white-noise error) instead.  Cost: a sort of
    the image and a few sums, O(ny nx log(ny nx)); well under 1 ms for
    40 x 256 pixels.
    """
    img, bad = _image_and_bad(image, mask)
    ny, nx = img.shape
    if int(row_pad) < 0 or int(column_pad) < 0:
        raise ParameterError(f"row_pad and column_pad must be >= 0; got {row_pad}, {column_pad}")
    if int(grow_width) < 1 or (grow_sigma is not None and not np.isfinite(grow_sigma)):
        raise ParameterError(f"grow_width must be an integer >= 1 and grow_sigma a finite number or None; "
                             f"got {grow_width}, {grow_sigma}")
    good = ~bad
    if not good.any():
        raise AllMaskedError("trace_source_mask: every pixel is masked; nothing to detect a trace in")
    v = img[good]
    v = v[::max(1, -(-v.size // _SCALE_SAMPLE))]  # every k-th value: ~2% on the scale
    keep = np.ones(v.size, bool)
    for _ in range(5):  # sigma clipping about the median with a MAD scale (common practice)
        med = np.median(v[keep])
        sig = _MAD_TO_SIGMA * np.median(np.abs(v[keep] - med))
        new = np.abs(v - med) <= 3.0 * sig if sig > 0 else keep
        if np.array_equal(new, keep):
            break
        keep = new
    level, sigma = float(med), float(sig)
    b = np.where(good, img - level, 0.0)
    g = good.astype(float)

    def mean_along(axis, sel=None):
        bb, gg = (b, g) if sel is None else ((b[sel], g[sel]) if axis == 0 else (b[:, sel], g[:, sel]))
        n = gg.sum(axis=axis)
        with np.errstate(invalid="ignore", divide="ignore"):
            return bb.sum(axis=axis) / n, n

    def high_rows(means, counts):
        # rows: threshold from the scatter of the row means themselves, which holds the
        # correlated read noise common to a row as well as the white noise
        ok = counts > 0
        if ok.sum() < 3:
            return ok
        med = np.median(means[ok])
        scale = max(_MAD_TO_SIGMA * np.median(np.abs(means[ok] - med)),
                    sigma / np.sqrt(max(counts[ok].max(), 1)))
        with np.errstate(invalid="ignore"):
            return _runs_at_least(ok & (means - med > n_sigma * scale), min_run)

    if rows is not None:
        guess = source_mask_from_rows((ny, nx), rows)[:, 0]
    else:
        guess = high_rows(*mean_along(1))
    cols = np.zeros(nx, bool)
    if guess.any():
        # columns: mean over the guess rows minus the mean over the other rows (column
        # stripes and sky structure cancel), against its white-noise error
        m_in, n_in = mean_along(0, guess)
        m_out, n_out = mean_along(0, ~guess) if (~guess).any() else (np.zeros(nx), np.zeros(nx))
        m_out = np.where(n_out > 0, m_out, 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            err = sigma * np.sqrt(1.0 / n_in + np.where(n_out > 0, 1.0 / np.maximum(n_out, 1), 0.0))
            cols = _runs_at_least((n_in > 0) & (m_in - m_out > n_sigma * err), min_run)
    if cols.any() and grow_sigma is not None and int(grow_width) > 1:
        cols = _grow_columns(cols, m_in - m_out, err, n_in > 0, float(grow_sigma), int(grow_width))
    if cols.any():
        trows = high_rows(*mean_along(1, cols))
        if not trows.any():
            trows = guess
    else:
        trows, cols = guess, np.ones(nx, bool) if guess.any() else cols
    trows = _pad(trows, int(row_pad))
    cols = _pad(cols, int(column_pad)) if not cols.all() else cols
    out = trows[:, None] & cols[None, :]
    if pixel_sigma is not None:
        from scipy.ndimage import binary_dilation, convolve
        k = np.ones((3, 3))
        s, n = convolve(b, k, mode="constant"), convolve(g, k, mode="constant")
        with np.errstate(invalid="ignore", divide="ignore"):
            boxm = np.where(n >= 5, s / np.maximum(n, 1), np.nan)
        # scatter of the box means themselves: correlated read noise does not average down
        # over 3 x 3 pixels, white noise does (sigma / 3)
        ok = np.isfinite(boxm)
        bm = boxm[ok][::max(1, -(-int(ok.sum()) // _SCALE_SAMPLE))]
        bmed = np.median(bm) if bm.size else 0.0
        bsig = _MAD_TO_SIGMA * np.median(np.abs(bm - bmed)) if bm.size else 0.0
        with np.errstate(invalid="ignore"):
            bright = ok & (boxm - bmed > pixel_sigma * max(bsig, sigma / 3.0))
        if bright.any():
            st = np.ones((2 * int(row_pad) + 1, 2 * int(column_pad) + 1), bool)
            out |= binary_dilation(bright, structure=st)
    return TraceMask(mask=out, rows=trows, columns=cols, level=level, sigma=sigma)


def detect_source_mask(image, *, mask=None, n_sigma=3.0, n_pixels=5, dilate_size=5):
    """Mask of sources found by :func:`photutils.segmentation.detect_sources`, dilated.

    Pixels where ``mask`` is True (bad) are ignored by the detection.  The
    input is not modified.

    Parameters
    ----------
    image : array_like of shape (ny, nx)
    mask : array_like of bool, optional
        True = bad pixel.
    n_sigma : float
        Detection threshold above the sigma-clipped background, in sigma
        (:func:`photutils.segmentation.detect_threshold`).
    n_pixels : int
        Minimum number of connected pixels of a source.
    dilate_size : int
        Side of the square footprint of the dilation, pixels (0 = none).

    Returns
    -------
    source_mask : ndarray of bool, shape (ny, nx), True = source
    """
    from photutils.segmentation import detect_sources, detect_threshold
    from photutils.utils.exceptions import NoDetectionsWarning

    img = np.asarray(image, dtype=float)
    bad = ~np.isfinite(img) if mask is None else (np.asarray(mask, dtype=bool) | ~np.isfinite(img))
    clean = np.where(bad, 0.0, img)
    threshold = detect_threshold(clean, n_sigma, mask=bad)
    with warnings.catch_warnings():
        # no source found is an expected outcome here: the mask is then empty
        warnings.simplefilter("ignore", NoDetectionsWarning)
        segm = detect_sources(clean, threshold, int(n_pixels), mask=bad)
    if segm is None:
        return np.zeros(img.shape, dtype=bool)
    if dilate_size and int(dilate_size) > 1:
        return np.asarray(segm.make_source_mask(size=int(dilate_size)), dtype=bool)
    return segm.data > 0
