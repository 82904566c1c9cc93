"""Optimal and box extraction of 1-D spectra from calibrated frames.

Inputs are chunks of calibrated exposures: ``flux`` in electrons per pixel
(background already subtracted), ``variance`` in e-^2 and a boolean ``mask``
that is True where a pixel is bad, all of shape ``(n_exposures, n_rows,
n_columns)`` with the dispersion along the last axis.  Masked, non-finite and
non-positive-variance pixels are never used; the inputs are never modified.

Algorithm (Horne 1986)
----------------------
1. Box spectrum ``f_box = sum_y D`` over the good pixels of each column.
2. Spatial profile: the normalised data ``D / f`` smoothed along the
   dispersion, either by a weighted low-order Legendre polynomial per row
   (``profile_method="polynomial"``) or by a running median
   (``profile_method="median"``), with iterative rejection (for the
   polynomial, outliers are first screened against a 7-column running
   median); each column
   normalised to unit sum, then negative values set to zero.  By default the profile is built
   twice, the second time from the optimal spectrum of the first pass, so that
   partly masked columns do not bias it.
3. Optimal spectrum ``f = sum(P M D / V) / sum(P^2 M / V)``; the single worst
   pixel of a column is rejected while ``(D - f P)^2 > threshold^2 V``; the
   variance may be revised from the model, ``V = read_variance + |f P|``.

The spatial profile (step 2, also along tilted traces) is fitted by
:mod:`lightledger.pipeline.spatialprofile` with the smoothing kernels of
:mod:`lightledger.pipeline.profilesmooth`; ``fit_profile`` is re-exported here.

Costs: the polynomial profile costs O(n_exposures n_rows n_columns K^2) time
for K = order + 1 and O(n_exposures n_rows n_columns K) memory; the running
median costs O(n_exposures n_rows n_columns w) time and memory for a window of
w columns.  Each rejection iteration costs O(n_exposures n_rows n_columns).
With ``trace_offset`` the joint polynomial fit costs, per rejection
iteration, O(n_exposures n_rows n_columns (5 K)^2) time to form the normal
equations and O(n_exposures ((2 n_rows + r) K)^3) to solve them, r being the
range of ``trace_offset`` in rows, and O(n_exposures n_rows n_columns 5 K)
memory for the sparse design matrix (about 0.4 s for 16 exposures of 15 rows
by 256 columns on one core, against 0.05 s along rows).

References
----------
Horne, K. 1986, PASP 98, 609, "An optimal extraction algorithm for CCD
spectroscopy".
Marsh, T. R. 1989, PASP 101, 1032, "The extraction of highly distorted
spectra" (polynomials along the trace on a grid of spatial positions).
Keys, R. 1981, IEEE Trans. ASSP 29, 1153, "Cubic convolution interpolation
for digital image processing" (citation from memory).
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError
from .spatialprofile import (_PROFILE_METHODS, _as_cube, _check_positive,  # noqa: F401 (re-exported)
                             _fit_profile, _validate, fit_profile)

__all__ = ["Spectrum", "fit_profile", "optimal_extract", "box_extract",
           "extract_chunk"]

_METHODS = ("optimal", "box")


@dataclass(frozen=True)
class Spectrum:
    """Extracted spectra of a chunk of exposures.

    Attributes
    ----------
    flux : ndarray of shape (n_exposures, n_columns)
        Electrons per column; NaN where ``mask`` is True.
    variance : ndarray of shape (n_exposures, n_columns)
        Variance of ``flux``, e-^2; NaN where ``mask`` is True.
    mask : ndarray of bool, shape (n_exposures, n_columns)
        True where the column is unusable (too little of the profile covered
        by good pixels, or every pixel masked).
    n_rejected : ndarray of int, shape (n_exposures, n_columns)
        Pixels rejected as outliers in each column.
    profile : ndarray of shape (n_exposures, n_rows, n_columns)
        Spatial profile: the normalised profile P that weights the optimal
        extraction, or the profile that patched the box sum's missing pixels
        (ones when a box had no profile: every pixel weighted 1).
    rejected : ndarray of bool, shape (n_exposures, n_rows, n_columns)
        True for pixels rejected as outliers (to be flagged
        ``mask.PROFILE_REJECT`` by the caller).
    row_lo : int
        Row of the input frame where the aperture (the first row of
        ``profile``) starts.
    method : str
        ``"optimal"`` or ``"box"``.
    """

    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    n_rejected: np.ndarray
    profile: np.ndarray
    rejected: np.ndarray
    row_lo: int
    method: str


# --------------------------------------------------------------------------
# extraction
# --------------------------------------------------------------------------

def _horne_iterate(data, variance, good, profile, threshold, max_iter, read_variance):
    """Optimal flux with one-pixel-per-column rejection; returns f, var, rejected, V."""
    use = good.copy()
    rejected = np.zeros(good.shape, dtype=bool)
    var_pix = np.where(good, variance, 1.0)
    f = None
    for _ in range(max_iter + 1):
        inv = np.where(use, 1.0 / var_pix, 0.0)
        den = (profile ** 2 * inv).sum(axis=1)
        num = (profile * data * inv).sum(axis=1)
        f = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
        if read_variance is not None:
            # Horne 1986 step 6: variance from the model, not from the data
            var_pix = read_variance + np.abs(f[:, None, :] * profile)
            var_pix = np.where(var_pix > 0, var_pix, np.inf)
        score = np.where(use, (data - f[:, None, :] * profile) ** 2 / var_pix, -1.0)
        worst = np.argmax(score, axis=1)                                  # (e, x)
        worst_score = np.take_along_axis(score, worst[:, None, :], axis=1)[:, 0, :]
        hit = worst_score > threshold ** 2
        if not hit.any():
            break
        e_idx, x_idx = np.nonzero(hit)
        y_idx = worst[e_idx, x_idx]
        use[e_idx, y_idx, x_idx] = False
        rejected[e_idx, y_idx, x_idx] = True
    inv = np.where(use, 1.0 / var_pix, 0.0)
    den = (profile ** 2 * inv).sum(axis=1)
    num = (profile * data * inv).sum(axis=1)
    f = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return f, den, use, rejected


def optimal_extract(flux, variance, mask=None, *, threshold=5.0, max_iter=10,
                    profile=None, profile_method="polynomial", profile_order=3,
                    profile_window=21, profile_passes=2, read_variance=None,
                    trace_offset=None, min_coverage=0.5):
    """Optimal extraction (Horne 1986) of every exposure of a chunk.

    Pixels where ``mask`` is True (and non-finite pixels or pixels with
    non-positive variance) get zero weight; their flux is recovered through
    the profile.  A column is flagged unusable when its good pixels cover less
    than ``min_coverage`` of its profile.  Raises AllMaskedError when every
    pixel is bad.  Inputs are not modified.

    Parameters
    ----------
    flux : array_like of shape (n_exposures, n_rows, n_columns)
        Background-subtracted data D in the aperture, electrons.
    variance : array_like, same shape
        Pixel variance V, e-^2.
    mask : array_like of bool, same shape, optional
        True = bad pixel.
    threshold : float, keyword-only
        Pixels with ``(D - f P)^2 > threshold^2 V`` are rejected, the worst
        one per column per iteration.
    max_iter : int
        Largest number of rejection iterations.
    profile : array_like of shape (n_exposures, n_rows, n_columns), optional
        A given normalised profile; default: fitted from the data with
        :func:`fit_profile`.
    profile_method, profile_order, profile_window
        Passed to :func:`fit_profile` as ``method``, ``order``, ``window``.
    profile_passes : int
        Number of profile fits, >= 1; pass k > 1 normalises the data by the
        optimal spectrum of pass k - 1.
    read_variance : float or array_like, optional
        If given, the pixel variance is revised from the model each
        iteration, ``V = read_variance + |f P|`` (Horne 1986 step 6), e-^2;
        it should hold every noise term except the source's shot noise.
    trace_offset : array_like of shape (n_columns,) or (n_exposures, n_columns), optional
        Trace row offset per column, for tilted traces; see :func:`fit_profile`.
    min_coverage : float
        Smallest ``sum(M P)`` of a usable column, in (0, 1].

    Returns
    -------
    Spectrum

    Notes
    -----
    The estimator ``f = sum(P M D / V) / sum(P^2 M / V)`` is linear in the
    independent pixels D, whose expectation is ``f P``; it is unbiased and its
    variance is

    ``var f = sum(P^2 M^2 V / V^2) / sum(P^2 M / V)^2 = 1 / sum(P^2 M / V)``.

    Horne 1986 writes ``var f = sum(M P) / sum(P^2 M / V)``, which is the same
    when no pixel is masked (``sum P = 1``).  With masked pixels his numerator
    ``sum(M P) < 1`` would understate the variance of the estimator, so we
    return ``1 / sum(P^2 M / V)``.  By the Cauchy-Schwarz inequality,
    ``(sum P)^2 <= sum(P^2 / V) sum(V)``, so the variance never exceeds the
    box variance ``sum V`` of an unmasked column.  With ``read_variance`` the
    returned variance uses the revised V of the last iteration.

    References
    ----------
    Horne, K. 1986, PASP 98, 609.
    """
    flux, variance, good = _validate(flux, variance, mask)
    threshold = _check_positive("threshold", threshold)
    max_iter = int(max_iter)
    if max_iter < 0:
        raise ParameterError(f"max_iter: must be an integer >= 0, got {max_iter}")
    profile_passes = int(profile_passes)
    if profile_passes < 1:
        raise ParameterError(f"profile_passes: must be an integer >= 1, got {profile_passes}")
    min_coverage = float(min_coverage)
    if not 0 < min_coverage <= 1:
        raise ParameterError(f"min_coverage: must be in (0, 1], got {min_coverage}")
    if read_variance is not None:
        read_variance = np.asarray(read_variance, dtype=float)
        if np.any(~np.isfinite(read_variance)) or np.any(read_variance < 0):
            raise ParameterError("read_variance: must be finite and >= 0, e-^2")
    data = np.where(good, flux, 0.0)

    if profile is not None:
        prof = np.broadcast_to(np.asarray(profile, dtype=float), flux.shape)
        if not np.all(np.isfinite(prof)) or np.any(prof < 0):
            raise ParameterError("profile: must be finite and >= 0")
        f, den, use, rejected = _horne_iterate(data, variance, good, prof, threshold,
                                               max_iter, read_variance)
    else:
        spec = None
        fit_good = good
        for _ in range(profile_passes):
            prof = _fit_profile(flux, variance, fit_good, spectrum=spec,
                                method=profile_method, order=profile_order,
                                window=profile_window, threshold=threshold, n_iter=3,
                                trace_offset=trace_offset)
            f, den, use, rejected = _horne_iterate(data, variance, good, prof, threshold,
                                                   max_iter, read_variance)
            # next pass: normalise by the optimal spectrum, rejected pixels left out
            spec = f
            fit_good = good & ~rejected

    coverage = (prof * use).sum(axis=1)
    var = np.where(den > 0, 1.0 / np.where(den > 0, den, 1.0), np.nan)
    # contract: a column that is NaN in flux or variance is always masked
    bad_col = (~(den > 0) | ~(coverage >= min_coverage) | ~np.isfinite(f)
               | ~np.isfinite(var))
    flux_out = np.where(bad_col, np.nan, f)
    var_out = np.where(bad_col, np.nan, var)
    return Spectrum(flux=flux_out, variance=var_out, mask=bad_col,
                    n_rejected=rejected.sum(axis=1).astype(int),
                    profile=np.array(prof), rejected=rejected, row_lo=0,
                    method="optimal")


def box_extract(flux, variance, mask=None, *, profile=None, rows=None, threshold=None,
                max_iter=10, min_coverage=0.5):
    """Box (unweighted sum) extraction over the rows given.

    Without ``profile``, a column with any masked, non-finite or
    non-positive-variance pixel is flagged unusable (the plain sum cannot
    recover the missing flux).  With ``profile``, the flux of such pixels is
    recovered through the profile (the usual patch of a box sum) and a column
    is flagged only when its good pixels hold less than ``min_coverage`` of the
    profile.  Raises AllMaskedError when every pixel is bad.  Inputs are not
    modified.

    Parameters
    ----------
    flux : array_like of shape (n_exposures, n_rows, n_columns)
        Background-subtracted data, electrons.
    variance : array_like, same shape
        Pixel variance, e-^2.
    mask : array_like of bool, same shape, optional
        True = bad pixel.
    profile : array_like, same shape, optional, keyword-only
        Non-negative spatial profile of each exposure (e.g. from
        :func:`fit_profile`); it is renormalised to unit sum over the box
        rows of each column.
    rows : array_like of bool, same shape, optional
        True for the pixels inside each exposure's box (a box that follows a
        moving band); default every row.  Pixels outside are neither summed
        nor counted as missing.
    threshold : float, optional
        With ``profile``: a pixel with ``(D - f P)^2 > threshold^2 V`` is
        rejected as an outlier and patched like a masked pixel, the worst one
        per column per iteration, at most ``max_iter`` iterations; default no
        rejection.
    max_iter : int
        Largest number of rejection iterations.
    min_coverage : float
        Smallest profile fraction held by the good pixels of a usable column
        (with ``profile``), in (0, 1].

    Returns
    -------
    Spectrum
        ``profile`` holds the profile that patched missing pixels, normalised
        over the box (without ``profile``: the box's weights, ones inside the
        box); rejected pixels are in ``rejected``.

    Notes
    -----
    ``f = sum_y D`` of independent pixels has ``var f = sum_y V``.  With a
    profile P normalised over the box, the patched sum is
    ``f = sum_y M D + f sum_y (1 - M) P``, i.e. ``f = sum(M D) / sum(M P)``
    (M = 1 for a good pixel), with ``var f = sum(M V) / sum(M P)^2`` (P taken
    as exact); with no pixel missing both reduce to the plain sum.
    """
    flux, variance, good = _validate(flux, variance, mask)
    inside = np.ones(flux.shape, bool) if rows is None else _as_cube("rows", rows, dtype=bool)
    if inside.shape != flux.shape:
        raise ParameterError(f"rows: shape {inside.shape} must equal flux shape {flux.shape}")
    good = good & inside
    weights = inside.astype(float)
    data = np.where(good, flux, 0.0)
    var_pix = np.where(good, variance, 0.0)
    rejected = np.zeros(flux.shape, dtype=bool)
    if profile is None:
        bad_col = ~(good | ~inside).all(axis=1) | ~good.any(axis=1)
        f = data.sum(axis=1)
        v = var_pix.sum(axis=1)
    else:
        prof = np.broadcast_to(np.asarray(profile, dtype=float), flux.shape)
        if not np.all(np.isfinite(prof)) or np.any(prof < 0):
            raise ParameterError("profile: must be finite and >= 0")
        min_coverage = float(min_coverage)
        if not 0 < min_coverage <= 1:
            raise ParameterError(f"min_coverage: must be in (0, 1], got {min_coverage}")
        prof = np.where(inside, prof, 0.0)
        total = prof.sum(axis=1, keepdims=True)
        prof = np.where(total > 0, prof / np.where(total > 0, total, 1.0), 0.0)
        use = good.copy()
        for _ in range(int(max_iter) + 1 if threshold is not None else 1):
            cover = (prof * use).sum(axis=1)
            f = np.where(cover > 0, (data * use).sum(axis=1) / np.where(cover > 0, cover, 1.0), 0.0)
            if threshold is None:
                break
            score = np.where(use, (data - f[:, None, :] * prof) ** 2
                             / np.where(use, variance, 1.0), -1.0)
            worst = np.argmax(score, axis=1)
            worst_score = np.take_along_axis(score, worst[:, None, :], axis=1)[:, 0, :]
            hit = worst_score > float(threshold) ** 2
            if not hit.any():
                break
            e_idx, x_idx = np.nonzero(hit)
            y_idx = worst[e_idx, x_idx]
            use[e_idx, y_idx, x_idx] = False
            rejected[e_idx, y_idx, x_idx] = True
        cover = (prof * use).sum(axis=1)
        f = np.where(cover > 0, (data * use).sum(axis=1) / np.where(cover > 0, cover, 1.0), 0.0)
        v = np.where(cover > 0, (var_pix * use).sum(axis=1) / np.where(cover > 0, cover, 1.0) ** 2,
                     np.nan)
        bad_col = ~(cover >= min_coverage) | ~np.isfinite(f) | ~np.isfinite(v)
    return Spectrum(flux=np.where(bad_col, np.nan, f),
                    variance=np.where(bad_col, np.nan, v), mask=bad_col,
                    n_rejected=rejected.sum(axis=1).astype(int),
                    profile=weights if profile is None else prof, rejected=rejected, row_lo=0,
                    method="box")


def extract_chunk(flux, variance, mask=None, *, method="optimal", aperture=None,
                  threshold=5.0, max_iter=10, profile_method="polynomial",
                  profile_order=3, profile_window=21, profile_passes=2,
                  read_variance=None, trace_offset=None, min_coverage=0.5):
    """Extract the spectra of a chunk of exposures inside an aperture.

    Pixels where ``mask`` is True are bad (see :func:`optimal_extract` and
    :func:`box_extract` for how each method treats them); rows of the
    aperture outside an exposure's own band (per-exposure apertures of a
    scan) are left out: masked for the optimal extraction, outside the box
    for the box extraction, which sums each exposure over its own rows.
    Inputs are not modified.

    Parameters
    ----------
    flux, variance, mask : array_like of shape (n_exposures, n_rows, n_columns)
        Calibrated frames: electrons, e-^2, True = bad.
    method : {"optimal", "box"}
        Extraction method.
    aperture : (row_lo, row_hi), optional
        Half-open row range ``[row_lo, row_hi)``; each an int, or an array of
        shape (n_exposures,) for a band that moves (scans).  Default: all rows.
    threshold, max_iter, profile_method, profile_order, profile_window,
    profile_passes, read_variance, min_coverage
        See :func:`optimal_extract`.  ``"box"`` uses the profile options to
        fit the profile that patches masked and outlying pixels (one pass),
        ``threshold`` and ``max_iter`` for its outliers and ``min_coverage``;
        it ignores ``profile_passes`` and ``read_variance``.
    trace_offset : array_like of shape (n_columns,) or (n_exposures, n_columns), optional
        Trace row offset per column, for the profile.

    Returns
    -------
    Spectrum
        ``row_lo`` is the first row of the extracted region of the input.
    """
    if method not in _METHODS:
        raise ParameterError(f"method: must be one of {_METHODS}, got {method!r}")
    flux = _as_cube("flux", flux)
    variance = _as_cube("variance", variance)
    mask = np.zeros(flux.shape, bool) if mask is None else _as_cube("mask", mask, dtype=bool)
    n_exp, ny, nx = flux.shape
    if aperture is None:
        lo = np.zeros(n_exp, dtype=int)
        hi = np.full(n_exp, ny, dtype=int)
    else:
        try:
            lo_in, hi_in = aperture
        except (TypeError, ValueError):
            raise ParameterError("aperture: must be a pair (row_lo, row_hi)") from None
        lo = np.broadcast_to(np.asarray(lo_in), (n_exp,))
        hi = np.broadcast_to(np.asarray(hi_in), (n_exp,))
        if not (np.all(lo == np.round(lo)) and np.all(hi == np.round(hi))):
            raise ParameterError("aperture: row_lo and row_hi must be whole rows")
        lo = lo.astype(int)
        hi = hi.astype(int)
        if np.any(lo < 0) or np.any(hi > ny) or np.any(hi <= lo):
            raise ParameterError(f"aperture: need 0 <= row_lo < row_hi <= {ny}, "
                                 f"got {lo.min()}..{hi.max()}")
    r0, r1 = int(lo.min()), int(hi.max())
    rows = np.arange(r0, r1)[None, :, None]
    outside = (rows < lo[:, None, None]) | (rows >= hi[:, None, None])
    sub_mask = mask[:, r0:r1] | outside
    sub_flux, sub_var = flux[:, r0:r1], variance[:, r0:r1]
    if method == "box":
        # each exposure's own rows; missing and outlying pixels patched through the
        # profile that optimal extraction would use
        inside = ~np.broadcast_to(outside, sub_flux.shape)
        prof = fit_profile(sub_flux, sub_var, sub_mask, method=profile_method,
                           order=profile_order, window=profile_window, threshold=threshold,
                           trace_offset=trace_offset)
        spec = box_extract(sub_flux, sub_var, mask[:, r0:r1], profile=prof, rows=inside,
                           threshold=threshold, max_iter=max_iter, min_coverage=min_coverage)
    else:
        spec = optimal_extract(sub_flux, sub_var, sub_mask, threshold=threshold,
                               max_iter=max_iter, profile_method=profile_method,
                               profile_order=profile_order,
                               profile_window=profile_window,
                               profile_passes=profile_passes,
                               read_variance=read_variance,
                               trace_offset=trace_offset, min_coverage=min_coverage)
    return Spectrum(flux=spec.flux, variance=spec.variance, mask=spec.mask,
                    n_rejected=spec.n_rejected, profile=spec.profile,
                    rejected=spec.rejected, row_lo=r0, method=spec.method)
