"""Trace position, tilt and width; per-exposure offsets; extent of a scanned band.

Frames are background-subtracted electrons with the dispersion along the last
axis (columns) and the spatial direction along the axis before it (rows).
A boolean ``mask`` is True where a pixel is bad; bad and non-finite pixels get
zero weight.  Inputs are never modified.

The centroid of each column is a windowed first moment along the rows,
iterated so that the window is centred on the centroid; the window's edge
pixels count with their fractional overlap, which makes the moment a
continuous function of the centre and removes the bias of a hard window for
symmetric profiles.  Row-versus-column centroids are then fitted by a
low-order polynomial with iterative sigma clipping.

Cost: O(n_iter n_exposures n_rows n_columns) time and O(n_exposures n_rows
n_columns) memory.

References
----------
Deming, D., et al. 2013, ApJ 774, 95 (spatial scans: the band a source
crosses during an exposure).
Sheppard, W. F. 1898, Proc. London Math. Soc. 29, 353 (the 1/12 pixel^2
correction of a second moment of binned data; citation from memory).
"""

from dataclasses import dataclass
import warnings

import numpy as np
from astropy.stats import mad_std

from .errors import AllMaskedError, ParameterError

__all__ = ["Trace", "TraceOffsets", "ScanBand", "column_centroids", "fit_trace",
           "refine", "scan_band"]


@dataclass(frozen=True)
class Trace:
    """Trace of a spectrum on the (sub-array) frame.

    Attributes
    ----------
    coefficients : ndarray of shape (order + 1,)
        Row of the trace centre, ``row(x) = sum_k c_k (x - x_ref)^k``, lowest
        power first; rows and columns of the frame given.
    x_ref : float
        Reference column of the polynomial.
    width : float
        Gaussian sigma of the cross-dispersion profile, rows.
    row_lo, row_hi : int
        Half-open aperture ``[row_lo, row_hi)`` holding the trace within
        ``aperture_half_width`` sigma over all columns, clipped to the frame.
    residual_rms : float
        Robust rms of the accepted column centroids about the fit, rows.
    n_columns : int
        Columns accepted in the fit.
    """

    coefficients: np.ndarray
    x_ref: float
    width: float
    row_lo: int
    row_hi: int
    residual_rms: float
    n_columns: int

    def rows(self, columns):
        """Trace centre row at ``columns`` (array_like, any shape), rows."""
        x = np.asarray(columns, dtype=float) - self.x_ref
        return np.polynomial.polynomial.polyval(x, self.coefficients)

    @property
    def tilt(self):
        """dy/dx at ``x_ref``, rows per column."""
        return float(self.coefficients[1]) if len(self.coefficients) > 1 else 0.0


@dataclass(frozen=True)
class TraceOffsets:
    """Per-exposure position of the trace relative to a :class:`Trace`.

    Attributes
    ----------
    offset : ndarray of shape (n_exposures,)
        Mean row offset of each exposure's column centroids from the trace,
        rows (positive = toward larger rows).
    offset_error : ndarray of shape (n_exposures,)
        Standard error of ``offset`` from the scatter of the columns, rows.
    width : ndarray of shape (n_exposures,)
        Gaussian sigma of the cross-dispersion profile, rows (median over
        columns of the Sheppard-corrected second moment).
    row_lo, row_hi : ndarray of int, shape (n_exposures,)
        Each exposure's aperture, the trace's shifted by ``offset``.
    """

    offset: np.ndarray
    offset_error: np.ndarray
    width: np.ndarray
    row_lo: np.ndarray
    row_hi: np.ndarray


@dataclass(frozen=True)
class ScanBand:
    """Rows crossed by a scanned source in each exposure.

    Attributes
    ----------
    row_lo, row_hi : ndarray of shape (n_exposures,)
        Sub-pixel edges of the band (row coordinate; pixel r spans
        [r - 0.5, r + 0.5]).
    length : ndarray of shape (n_exposures,)
        ``row_hi - row_lo``, rows.
    level : ndarray of shape (n_exposures,)
        Plateau of the row profile, electrons per pixel (mean over columns).
    profile : ndarray of shape (n_exposures, n_rows)
        Row profile: mean over the good pixels of each row, electrons.
    """

    row_lo: np.ndarray
    row_hi: np.ndarray
    length: np.ndarray
    level: np.ndarray
    profile: np.ndarray


def _as_stack(name, a, dtype=float):
    a = np.asarray(a, dtype=dtype)
    if a.ndim < 2:
        raise ParameterError(f"{name}: expected an array of shape (..., n_rows, n_columns), "
                             f"got {a.ndim} dimension(s)")
    return a


def _good(flux, mask):
    good = np.isfinite(flux)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != flux.shape:
            raise ParameterError(f"mask: shape {mask.shape} must equal flux shape {flux.shape}")
        good &= ~mask
    if not good.any():
        raise AllMaskedError("flux: every pixel is masked or non-finite")
    return good


def column_centroids(flux, mask=None, *, guess=None, half_window=4.0, n_iter=8):
    """Windowed first and second moments along the rows of every column.

    Pixels where ``mask`` is True or that are non-finite get zero weight.
    Inputs are not modified.

    Parameters
    ----------
    flux : array_like of shape (..., n_rows, n_columns)
        Background-subtracted electrons.
    mask : array_like of bool, same shape, optional
        True = bad pixel.
    guess : array_like of shape (..., n_columns), optional
        Starting rows; default the row of each column's maximum.
    half_window : float
        Half-width of the window, rows (> 0.5).
    n_iter : int
        Re-centring iterations (>= 1).

    Returns
    -------
    centroid : ndarray of shape (..., n_columns)
        Rows; NaN where the windowed sum is not positive.
    sigma : ndarray of shape (..., n_columns)
        Square root of the Sheppard-corrected windowed second moment, rows.
    total : ndarray of shape (..., n_columns)
        Windowed sum, electrons.

    Notes
    -----
    Pixel r spans [r - 0.5, r + 0.5] and enters with its overlap with the
    window [c - h, c + h], ``w_r = clip(h + 0.5 - |r - c|, 0, 1)``.  The
    second moment of pixel-binned data exceeds the profile's variance by
    1/12 pixel^2 (Sheppard 1898), which we subtract.
    """
    flux = _as_stack("flux", flux)
    good = _good(flux, mask)
    half_window = float(half_window)
    if not half_window > 0.5:
        raise ParameterError(f"half_window: must be > 0.5 rows, got {half_window}")
    n_iter = int(n_iter)
    if n_iter < 1:
        raise ParameterError(f"n_iter: must be an integer >= 1, got {n_iter}")
    data = np.where(good, flux, 0.0)
    ny = flux.shape[-2]
    r = np.arange(ny, dtype=float)[:, None]
    if guess is None:
        c = np.argmax(data, axis=-2).astype(float)
    else:
        c = np.broadcast_to(np.asarray(guess, dtype=float), data.shape[:-2] + data.shape[-1:]).copy()
    for _ in range(n_iter):
        w = np.clip(half_window + 0.5 - np.abs(r - c[..., None, :]), 0.0, 1.0)
        tot = (w * data).sum(axis=-2)
        ok = tot > 0
        c_new = np.where(ok, (w * data * r).sum(axis=-2) / np.where(ok, tot, 1.0), np.nan)
        c = np.where(np.isfinite(c_new), np.clip(c_new, 0, ny - 1), c)
    w = np.clip(half_window + 0.5 - np.abs(r - c[..., None, :]), 0.0, 1.0)
    tot = (w * data).sum(axis=-2)
    ok = tot > 0
    cen = np.where(ok, (w * data * r).sum(axis=-2) / np.where(ok, tot, 1.0), np.nan)
    m2 = np.where(ok, (w * data * (r - cen[..., None, :]) ** 2).sum(axis=-2)
                  / np.where(ok, tot, 1.0), np.nan)
    sigma = np.sqrt(np.clip(m2 - 1.0 / 12.0, 0.0, None))
    return cen, sigma, tot


def fit_trace(frame, mask=None, *, order=1, x_ref=None, width_guess=1.5,
              threshold=4.0, max_iter=5, aperture_half_width=4.0, min_fraction=0.1):
    """Trace position, tilt and width from a (median) frame.

    Pixels where ``mask`` is True or that are non-finite are ignored.
    Columns whose windowed sum is below ``min_fraction`` of the median column
    sum are left out of the fit.  Raises AllMaskedError when nothing is left.
    The input is not modified.

    Parameters
    ----------
    frame : array_like of shape (n_rows, n_columns)
        Background-subtracted electrons (e.g. the median of a visit).
    mask : array_like of bool, same shape, optional
        True = bad pixel.
    order : int
        Degree of the row-versus-column polynomial (0, 1, 2, ...).
    x_ref : float, optional
        Reference column; default the middle column.
    width_guess : float
        First guess of the Gaussian sigma, rows; sets the centroid window.
    threshold : float
        Columns deviating by more than ``threshold`` robust sigma from the fit
        are rejected, iteratively.
    max_iter : int
        Largest number of clipping iterations.
    aperture_half_width : float
        Half-width of the returned aperture, in units of ``width``.
    min_fraction : float
        Smallest windowed column sum used, relative to the median.

    Returns
    -------
    Trace

    Notes
    -----
    A photon-limited centroid of N electrons in a profile of sigma s has
    variance about s^2 / N, so the polynomial is fitted with weights
    proportional to the column sum N.
    """
    frame = np.asarray(frame, dtype=float)
    if frame.ndim != 2:
        raise ParameterError(f"frame: expected shape (n_rows, n_columns), got {frame.ndim} dimensions")
    order = int(order)
    if order < 0:
        raise ParameterError(f"order: must be an integer >= 0, got {order}")
    ny, nx = frame.shape
    x_ref = (nx - 1) / 2.0 if x_ref is None else float(x_ref)
    hw = max(4.0 * float(width_guess), 1.0)
    cen, sig, tot = column_centroids(frame, mask, half_window=hw)
    cols = np.arange(nx, dtype=float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        med_tot = np.nanmedian(np.where(tot > 0, tot, np.nan))
    use = np.isfinite(cen) & (tot > min_fraction * med_tot)
    if use.sum() <= order:
        raise AllMaskedError(f"frame: only {int(use.sum())} columns with signal, need > order = {order}")
    coef = None
    for _ in range(max_iter + 1):
        coef = np.polynomial.polynomial.polyfit(cols[use] - x_ref, cen[use], order,
                                                w=np.sqrt(tot[use]))
        resid = cen - np.polynomial.polynomial.polyval(cols - x_ref, coef)
        scatter = mad_std(resid[use])
        if not scatter > 0:
            break
        new_use = use & (np.abs(resid) <= threshold * scatter)
        if new_use.sum() == use.sum() or new_use.sum() <= order:
            break
        use = new_use
    # second pass: centroids re-measured around the fitted trace
    guess = np.polynomial.polynomial.polyval(cols - x_ref, coef)
    cen, sig, tot = column_centroids(frame, mask, guess=guess, half_window=hw)
    use &= np.isfinite(cen)
    coef = np.polynomial.polynomial.polyfit(cols[use] - x_ref, cen[use], order,
                                            w=np.sqrt(tot[use]))
    resid = cen - np.polynomial.polynomial.polyval(cols - x_ref, coef)
    width = float(np.median(sig[use]))
    rows = np.polynomial.polynomial.polyval(cols - x_ref, coef)
    lo = int(np.clip(np.floor(rows.min() - aperture_half_width * width + 0.5), 0, ny))
    hi = int(np.clip(np.ceil(rows.max() + aperture_half_width * width + 0.5), 0, ny))
    return Trace(coefficients=np.asarray(coef, dtype=float), x_ref=x_ref, width=width,
                 row_lo=lo, row_hi=hi, residual_rms=float(mad_std(resid[use])),
                 n_columns=int(use.sum()))


def refine(trace, flux, mask=None, *, half_window=None, threshold=5.0,
           aperture_half_width=4.0):
    """Offset and width of the trace in every exposure.

    Pixels where ``mask`` is True or that are non-finite are ignored; inputs
    are not modified.

    Parameters
    ----------
    trace : Trace
        The visit's trace (from :func:`fit_trace`).
    flux : array_like of shape (n_exposures, n_rows, n_columns)
        Background-subtracted electrons.
    mask : array_like of bool, same shape, optional
        True = bad pixel.
    half_window : float, optional
        Centroid window half-width, rows; default ``4 * trace.width``.
    threshold : float
        Columns whose offset deviates by more than ``threshold`` robust sigma
        from the exposure's median are left out.
    aperture_half_width : float
        Half-width of each exposure's aperture, in units of ``trace.width``.

    Returns
    -------
    TraceOffsets

    Notes
    -----
    The offset is the mean, weighted by the column sums N_x, of the column
    offsets d_x; its standard error is
    ``sqrt(sum N_x^2 (d_x - d)^2) / sum N_x`` (weights treated as exact).
    """
    flux = _as_stack("flux", flux)
    if flux.ndim == 2:
        flux = flux[np.newaxis]
        mask = None if mask is None else np.asarray(mask, bool)[np.newaxis]
    n_exp, ny, nx = flux.shape
    hw = 4.0 * trace.width if half_window is None else float(half_window)
    hw = max(hw, 1.0)
    cols = np.arange(nx, dtype=float)
    guess = np.broadcast_to(trace.rows(cols), (n_exp, nx))
    # two rounds: a first offset moves the window onto the exposure's trace
    d0 = np.zeros(n_exp)
    for _ in range(2):
        cen, sig, tot = column_centroids(flux, mask, guess=guess + d0[:, None], half_window=hw)
        d = cen - guess
        ok = np.isfinite(d) & (tot > 0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            med = np.nanmedian(np.where(ok, d, np.nan), axis=1)
            spread = mad_std(np.where(ok, d, np.nan), axis=1, ignore_nan=True)
        ok &= np.abs(d - med[:, None]) <= threshold * np.where(spread > 0, spread, np.inf)[:, None]
        wgt = np.where(ok, tot, 0.0)
        sw = wgt.sum(axis=1)
        if np.any(sw <= 0):
            raise AllMaskedError("flux: an exposure has no column with signal near the trace")
        d0 = (wgt * np.where(ok, d, 0.0)).sum(axis=1) / sw
    err = np.sqrt((wgt ** 2 * np.where(ok, d - d0[:, None], 0.0) ** 2).sum(axis=1)) / sw
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        width = np.nanmedian(np.where(ok, sig, np.nan), axis=1)
    rows = trace.rows(cols)
    lo = np.clip(np.floor(rows.min() + d0 - aperture_half_width * trace.width + 0.5), 0, ny)
    hi = np.clip(np.ceil(rows.max() + d0 + aperture_half_width * trace.width + 0.5), 0, ny)
    return TraceOffsets(offset=d0, offset_error=err, width=width,
                        row_lo=lo.astype(int), row_hi=hi.astype(int))


def scan_band(flux, mask=None, *, level=0.5, margin=4):
    """Extent and row profile of the band a scanned source crossed.

    Pixels where ``mask`` is True or that are non-finite are left out of the
    row means; rows without a good pixel count as zero.  Inputs are not
    modified.

    Parameters
    ----------
    flux : array_like of shape (n_exposures, n_rows, n_columns) or (n_rows, n_columns)
        Background-subtracted electrons.
    mask : array_like of bool, same shape, optional
        True = bad pixel.
    level : float
        Fraction of the plateau that defines the rows in the band, in (0, 1).
    margin : int
        Rows beyond the first and last rows above ``level`` that enter the
        edge sums; the plateau is the median of the rows at least ``margin``
        rows inside the band.

    Returns
    -------
    ScanBand

    Notes
    -----
    With row profile p, plateau L and a row m inside the band, the lower
    edge is ``a = m + 0.5 - sum_{r <= m} p_r / L`` and the upper edge
    ``b = m + 0.5 + sum_{r > m} p_r / L`` (sums over the band and ``margin``
    rows around it).  These are exact for a uniform band with sharp edges and
    for edges blurred by any symmetric point-spread function.
    """
    flux = _as_stack("flux", flux)
    if flux.ndim == 2:
        flux = flux[np.newaxis]
        mask = None if mask is None else np.asarray(mask, bool)[np.newaxis]
    level = float(level)
    if not 0 < level < 1:
        raise ParameterError(f"level: must be in (0, 1), got {level}")
    good = _good(flux, mask)
    n_exp, ny, nx = flux.shape
    n_good = good.sum(axis=2)
    prof = np.where(n_good > 0, np.where(good, flux, 0.0).sum(axis=2) / np.maximum(n_good, 1), 0.0)
    peak = prof.max(axis=1)
    if np.any(peak <= 0):
        raise AllMaskedError("flux: an exposure has no positive row")
    # first plateau: median of the rows above half the peak
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        plateau = np.nanmedian(np.where(prof > 0.5 * peak[:, None], prof, np.nan), axis=1)
    r = np.arange(ny)
    above = prof > 0.5 * peak[:, None]
    first = np.argmax(above, axis=1)
    last = ny - 1 - np.argmax(above[:, ::-1], axis=1)
    # plateau: median of the rows at least ``margin`` rows inside the edges
    core = (r >= (first + margin)[:, None]) & (r <= (last - margin)[:, None])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        core_level = np.nanmedian(np.where(core, prof, np.nan), axis=1)
    plateau = np.where(np.isfinite(core_level), core_level, plateau)
    above = prof >= level * plateau[:, None]
    first = np.argmax(above, axis=1)
    last = ny - 1 - np.argmax(above[:, ::-1], axis=1)
    mid = (first + last) // 2
    lo_row = np.clip(first - int(margin), 0, ny)
    hi_row = np.clip(last + int(margin) + 1, 0, ny)
    in_win = (r >= lo_row[:, None]) & (r < hi_row[:, None])
    below = in_win & (r <= mid[:, None])
    upper = in_win & (r > mid[:, None])
    norm = prof / plateau[:, None]
    a = mid + 0.5 - np.where(below, norm, 0.0).sum(axis=1)
    b = mid + 0.5 + np.where(upper, norm, 0.0).sum(axis=1)
    return ScanBand(row_lo=a, row_hi=b, length=b - a, level=plateau, profile=prof)
