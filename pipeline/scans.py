"""Spatial scans: band-masked sums of consecutive read differences.

During a spatial scan the source moves along the rows while the detector is
read non-destructively.  Each difference of consecutive reads holds the
charge collected during one interval, which falls in a band of rows that the
source crossed then.  Keeping only that band in each difference and summing
rejects most of the background and most cosmic rays (Deming et al. 2013).

The band of each difference is found from the data, not assumed: the
difference is median-filtered along the dispersion axis (which removes
single-pixel cosmic rays), collapsed along x into a row profile, and the run
of rows above ``band_sigma`` robust sigma of that profile around its peak,
padded by ``pad_rows``, is the band.  Forward and reverse scans are handled
alike.

Cosmic rays inside a band are found against a separable model of the band,
row profile times spectrum, fitted to each difference on its own (see
:func:`sum_scan` Notes): unlike the neighbouring columns of the difference,
it predicts the sharp lines of the spectrum and the peaks between them.

Cost: one median filter and a few sorts of the difference cube,
O(n_reads ny nx), the filter's elementwise min/max run in blocks that stay
in the processor's cache; the band models of all differences at once, on
the band's rows (two running medians of ``cr_width`` columns, by min/max
over shifted copies except within ``cr_width // 2`` columns of the frame's
edges and of the spectrum's ends, and one sort of each column's band
rows), O(n_reads n_band_rows nx cr_width); then a Python loop
runs over differences only, each step on one difference (the cosmic-ray
test and the sums on the band's rows only), so that the work arrays stay in
the processor's cache.  The background estimate of each difference is most
of the time.
"""

from dataclasses import dataclass

import numpy as np

from . import mask as dq
from .background import clipped_mean, estimate_background
from .destripe import destripe as _destripe
from .errors import ParameterError
from .maskedmedian import masked_median
# re-exported: the band finding and the row filter were split out of this module
from .rowmedian import (_FILTER_CHUNK, _FILTER_NETWORK_MAX, _median5_flat,  # noqa: F401
                        _median9_flat, _median9_triples, _median_filter_rows, _sort3)
from .scanbands import _band_models, _cut_window_median, find_bands  # noqa: F401

__all__ = ["ScanSum", "sum_scan", "find_bands", "SCAN_BACKGROUNDS", "SCAN_DESTRIPE"]

#: Allowed values of ``background`` in :func:`sum_scan`.
SCAN_BACKGROUNDS = ("rowcol", "constant", "none")
#: Allowed values of ``destripe`` in :func:`sum_scan`.
SCAN_DESTRIPE = ("off", "rows", "columns", "both")

_MAD_TO_SIGMA = 1.4826  # common practice


@dataclass(frozen=True)
class ScanSum:
    """Result of :func:`sum_scan`.

    Attributes
    ----------
    flux : ndarray of shape (ny, nx), float64
        Electrons collected from read 0 to the last read inside the bands,
        dark and background subtracted, flat-fielded (0 outside every band).
    variance : ndarray of shape (ny, nx), float64
        Variance of ``flux``, e-**2 (see :func:`sum_scan` Notes).
    bits : ndarray of shape (ny, nx), uint16
        UNSCANNED, RAMP_BREAK (a cosmic ray was replaced), OVERFILLED, INVALID_VALUE,
        NO_SLOPE (covered by a band but by no usable difference),
        SKY_CLIPPED (clipped from some difference's background).
    band_lo, band_hi : ndarray of shape (n_reads - 1,), int
        First and last row (inclusive, padded) of each difference's band.
    band_found : ndarray of shape (n_reads - 1,), bool
        False where no band stood out and the fallback band was used.
    background : ndarray of shape (n_reads - 1,), float64
        Median background level of each difference, e- per pixel.
    background_map : ndarray of shape (ny, nx), float64
        Background subtracted from each pixel's flux, e-.
    n_cosmic : ndarray of shape (n_reads - 1,), int
        Cosmic-ray pixels replaced in each difference's band.
    """

    flux: np.ndarray
    variance: np.ndarray
    bits: np.ndarray
    band_lo: np.ndarray
    band_hi: np.ndarray
    band_found: np.ndarray
    background: np.ndarray
    background_map: np.ndarray
    n_cosmic: np.ndarray


def sum_scan(reads, read_times, *, read_noise, saturated=None, dark_rate=None, flat=None,
             bad=None, band_sigma=5.0, pad_rows=3, filter_width=5, cr_threshold=6.0,
             cr_width=9, background="rowcol", clip_sigma=3.0, smooth_columns=9, destripe="off",
             source_columns=None, fallback_rows=None):
    """Flux of a spatially scanned exposure from band-masked read differences.

    Mask contract: ``bad`` (True = unusable pixel) and non-finite pixels are
    left out of the band profiles and background estimates (their flux is
    still summed; the caller flags them); reads flagged in ``saturated``
    (True = above saturation) and every later read are dropped with the
    differences they enter.  The inputs are not modified.

    Parameters
    ----------
    reads : array_like of shape (n_reads, ny, nx)
        Cumulative reads, electrons, linearised.
    read_times : array_like of shape (n_reads,)
        Seconds, strictly increasing.
    read_noise : float or array_like of shape (ny, nx)
        Electrons per read.
    saturated : array_like of bool, shape (n_reads, ny, nx), optional
    dark_rate : float or array_like of shape (ny, nx), optional
        Dark current, e-/s; ``dark_rate * dt`` is taken from each difference.
    flat : array_like of shape (ny, nx), optional
        Flat field (mean about 1); each dark-subtracted difference is divided
        by it.
    bad : array_like of bool, shape (ny, nx), optional
    band_sigma, pad_rows, filter_width, fallback_rows
        Band finding, see :func:`find_bands` (its filtered differences also
        stand in for unusable pixels in the band model).
    cr_threshold : float
        A usable pixel inside the band more than this many sigma (its own
        noise, from the model) above the band's separable model is a cosmic
        ray and is replaced by the model (see Notes).
    cr_width : int
        Columns (odd) of the running medians along the dispersion in the
        band model: tracks of up to ``cr_width // 2`` pixels along a row
        stay out of the band's profile.
    background : {"rowcol", "constant", "none"}
        Background of each difference from its out-of-band pixels: a
        smoothed per-column clipped mean ("rowcol", see
        :func:`lightledger.pipeline.background.estimate_background`), one
        clipped mean ("constant"), or nothing.
    clip_sigma, smooth_columns
        Background clipping threshold and column boxcar width.
    destripe : {"off", "rows", "columns", "both"}
        Stripes removed from each difference before the background, measured
        outside the band (and outside ``source_columns`` when given).
    source_columns : tuple of int (col_lo, col_hi), optional
        Columns of the spectrum; with it the destriping mask covers only the
        band's rows within these columns, so rows inside the band are also
        corrected.

    Returns
    -------
    ScanSum

    Raises
    ------
    ParameterError
        Wrong shapes or unknown option values.

    Notes
    -----
    Cosmic rays.  Inside its band each difference is modelled as
    ``m(y, x) = L + a(x) p(y, x)`` (:func:`_band_models`): ``L`` is the
    median of the row means of the difference's out-of-band rows, ``a(x)``
    the column's scale (which carries the spectrum, with its sharp lines)
    and ``p(y, x)`` the band's row profile, a running median along the
    dispersion of the columns normalised by their sums.  A pixel is a hit
    where ``d - m > cr_threshold sqrt(2 s**2 + max(m f + D dt, 0)) / f`` (``s``
    the read noise, ``f`` the flat, ``D dt`` the dark charge), and is
    replaced by ``m``.  The spectrum enters only through ``a(x)``, fitted to
    the column itself, so sharp lines and the peaks between them are
    predicted; a running median of the difference along the dispersion
    would undercut those peaks and take them for hits.

    For pixel ``p`` the flux is ``F = sum_k b_k (d_k - D dt_k) / f - B_k``
    with ``b_k`` = 1 inside difference ``k``'s band, ``D`` the dark rate,
    ``f`` the flat and ``B_k`` the background estimate.  Variance:

    * read noise: ``sum_k b_k d_k`` telescopes within each run of
      consecutive in-band differences to ``r_end - r_start``, so each run
      contributes ``2 s**2``: ``var_read = 2 s**2 n_runs / f**2``;
    * Poisson: the charge of the included intervals,
      ``sum_k b_k max(m_k f + D dt_k, 0) / f**2`` with ``m_k`` the band
      model (cosmic-ray free) of difference ``k``;
    * background: ``sum_k b_k var(B_k)``.

    Pixels outside every band have flux 0 and are given the variance of one
    read difference, ``2 s**2 / f**2``, so that no pixel has zero variance.

    References
    ----------
    Deming, D., et al. 2013, ApJ 774, 95.
    """
    if background not in SCAN_BACKGROUNDS:
        raise ParameterError(f"background must be one of {SCAN_BACKGROUNDS}; got {background!r}")
    if destripe not in SCAN_DESTRIPE:
        raise ParameterError(f"destripe must be one of {SCAN_DESTRIPE}; got {destripe!r}")
    try:
        width_ok = (not isinstance(cr_width, bool) and float(cr_width).is_integer()
                    and cr_width >= 1 and int(cr_width) % 2 == 1)
    except (TypeError, ValueError):
        width_ok = False
    if not width_ok:
        raise ParameterError(f"cr_width must be an odd integer >= 1 column; got {cr_width!r}")
    cr_width = int(cr_width)
    r = np.asarray(reads, dtype=float)
    if r.ndim != 3 or r.shape[0] < 2:
        raise ParameterError(f"reads must have shape (n_reads >= 2, ny, nx); got {r.shape}")
    n_reads, ny, nx = r.shape
    t = np.asarray(read_times, dtype=float)
    if t.shape != (n_reads,) or not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise ParameterError(f"read_times must be finite, strictly increasing, shape ({n_reads},)")
    dt = np.diff(t)
    s2 = np.broadcast_to(np.asarray(read_noise, dtype=float) ** 2, (ny, nx))
    dark = np.zeros((ny, nx)) if dark_rate is None else np.broadcast_to(np.asarray(dark_rate, float), (ny, nx))
    fl = np.ones((ny, nx)) if flat is None else np.broadcast_to(np.asarray(flat, float), (ny, nx))
    badpx = np.zeros((ny, nx), bool) if bad is None else np.broadcast_to(np.asarray(bad, bool), (ny, nx))
    flat_ok = np.isfinite(fl) & (fl > 0)
    fl_safe = np.where(flat_ok, fl, 1.0)

    finite = np.isfinite(r)
    good = finite.copy()
    sat_px = np.zeros((ny, nx), bool)
    if saturated is not None:
        sat = np.array(saturated, dtype=bool)  # a copy: the input is not modified
        if sat.shape != r.shape:
            raise ParameterError(f"saturated must have the shape of reads {r.shape}; got {sat.shape}")
        for k in range(1, n_reads):  # a read after a saturated one is saturated too
            np.logical_or(sat[k - 1], sat[k], out=sat[k])
        sat_px = sat[-1]
        good &= ~sat
    valid = good[1:] & good[:-1] & np.isfinite(dark) & flat_ok
    n_diff = n_reads - 1
    rz = r if finite.all() else np.where(finite, r, 0.0)
    d = np.empty((n_diff, ny, nx))
    all_valid = bool(valid.all())
    for k in range(n_diff):  # (r_k+1 - r_k - D dt_k) / f, 0 where unusable
        dk = np.subtract(rz[k + 1], rz[k], out=d[k])
        dk -= dark * dt[k]
        dk /= fl_safe
        if not all_valid:
            np.copyto(dk, 0.0, where=~valid[k])
    usable = valid & ~badpx

    lo, hi, found, filt = find_bands(d, valid=usable, band_sigma=band_sigma, pad_rows=pad_rows,
                                     filter_width=filter_width, fallback_rows=fallback_rows)
    rows = np.arange(ny)
    in_band_rows = (rows[None, :] >= lo[:, None]) & (rows[None, :] <= hi[:, None])  # (n_diff, ny)
    in_band = np.broadcast_to(in_band_rows[:, :, None], d.shape)

    if destripe != "off":
        smask = in_band.copy()
        if source_columns is not None:
            cols = np.arange(nx)
            incol = (cols >= int(source_columns[0])) & (cols <= int(source_columns[1]))
            smask = smask & incol[None, None, :]
        ds = _destripe(d, smask, axes=destripe, mask=~usable)
        d = np.where(valid, ds.frames, 0.0)
        filt = filt - ds.row_offsets[:, :, None] - ds.column_offsets[:, None, :]
    # the band model of every difference at once, on the band's rows; its
    # background level is the median of the out-of-band rows' means of the
    # filtered difference (0 without any)
    level, _ = masked_median(filt.mean(axis=2), in_band_rows, axis=1)
    level = np.nan_to_num(level)
    dark_ok = np.where(np.isfinite(dark), dark, 0.0)
    height = int(np.max(hi - lo)) + 1
    brow = np.minimum(lo[:, None] + np.arange(height)[None, :], ny - 1)  # (n_diff, height)
    kidx = np.arange(n_diff)[:, None]
    dark_b = dark_ok[brow] * dt[:, None, None]
    model_b, sigma_b = _band_models(d[kidx, brow], usable[kidx, brow], filt[kidx, brow],
                                    brow <= hi[:, None], level, 2.0 * s2[brow], fl_safe[brow], dark_b,
                                    width=cr_width)

    # One difference at a time; the band of difference k is the run of rows
    # lo[k] .. hi[k], so the per-pixel work is done on those rows only.
    bkg_map = np.zeros((ny, nx))
    bkg_var = np.zeros((ny, nx))
    contrib = np.zeros((ny, nx))
    pois = np.zeros((ny, nx))
    runs = np.zeros((ny, nx), dtype=int)
    levels = np.zeros(n_diff)
    n_cosmic = np.zeros(n_diff, dtype=int)
    bits = np.zeros((ny, nx), dtype=dq.MASK_DTYPE)
    hit_any = np.zeros((ny, nx), bool)
    take_any = np.zeros((ny, nx), bool)
    prev = np.zeros((ny, nx), bool)
    prev_band = slice(0, 0)
    for k in range(n_diff):
        band = slice(int(lo[k]), int(hi[k]) + 1)
        dk, fl_k = d[k, band], fl_safe[band]
        # cosmic rays inside the band, against the band's separable model
        nb = int(hi[k] - lo[k]) + 1
        model, sigma = model_b[k, :nb], sigma_b[k, :nb]
        charge = np.maximum(model * fl_k + dark_b[k, :nb], 0.0)
        hit = usable[k, band] & ((dk - model) > cr_threshold * sigma)
        np.copyto(dk, model, where=hit)  # d is this function's own array
        n_cosmic[k] = np.count_nonzero(hit)
        hit_any[band] |= hit

        inb = in_band[k]
        if background == "none":
            bk = np.zeros((ny, nx))
            bv = np.zeros((ny, nx))
            levels[k] = 0.0
        elif background == "rowcol":
            est = estimate_background(d[k], mask=~usable[k], source_mask=inb, method="rowcol",
                                      sigma=clip_sigma, smooth_columns=smooth_columns)
            bk, bv = est.background, est.variance
            bits |= est.bits
            levels[k] = est.level  # the median of bk
        else:
            out = usable[k] & ~inb
            mean, vmean, kept = clipped_mean(d[k][out], np.zeros(int(out.sum()), bool), axis=0,
                                             sigma=clip_sigma)
            bk = np.full((ny, nx), float(mean))
            bv = np.full((ny, nx), float(vmean))
            rej = np.zeros((ny, nx), bool)
            rej[out] = ~kept
            bits[rej] |= dq.SKY_CLIPPED
            levels[k] = float(mean)  # the median of a constant map
        take = valid[k, band]
        contrib[band] += np.where(take, dk - bk[band], 0.0)
        bkg_map[band] += np.where(take, bk[band], 0.0)
        bkg_var[band] += np.where(take, bv[band], 0.0)
        pois[band] += np.where(take, charge, 0.0)
        # runs of consecutive differences that enter the sum, per pixel (prev: the
        # previous difference's take, False outside its band)
        runs[band] += take & ~prev[band]
        take_any[band] |= take
        prev[prev_band] = False
        prev[band] = take
        prev_band = band

    var = (2.0 * s2 * runs + pois) / fl_safe ** 2 + bkg_var
    covered = np.broadcast_to(in_band_rows.any(axis=0)[:, None], (ny, nx))
    var = np.where(covered, var, 2.0 * s2 / fl_safe ** 2)

    bits[~covered] |= dq.UNSCANNED
    bits[hit_any] |= dq.RAMP_BREAK
    bits[sat_px] |= dq.OVERFILLED
    bits[covered & ~take_any] |= dq.NO_SLOPE
    bits[~finite.all(axis=0) | ~flat_ok | ~np.isfinite(dark)] |= dq.INVALID_VALUE
    return ScanSum(flux=contrib, variance=var, bits=bits, band_lo=lo, band_hi=hi, band_found=found,
                   background=levels, background_map=bkg_map, n_cosmic=n_cosmic)
