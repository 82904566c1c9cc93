"""Up-the-ramp slopes of non-destructive reads, with jump and saturation handling.

The input is a cube of cumulative reads already converted to electrons and
corrected for non-linearity by the caller (:func:`lightledger.pipeline.detector.linearize`).
Everything is vectorised over pixels; the only Python loops run over reads or
over a handful of iterations.

The fit works on the differences of consecutive reads, ``d_k = r_{k+1} - r_k``:
a cosmic-ray jump adds an unknown offset to one difference only, so splitting
the ramp at the jump and fitting a common slope with a free intercept per
segment is the same as dropping that difference and keeping the covariance of
the others (the maximum-likelihood estimate with a free offset on one
observation).  Saturated reads drop the differences they enter in the same way.
"""

from dataclasses import dataclass

import numpy as np

from . import mask as dq
from .errors import ParameterError

__all__ = ["RampFit", "fit_ramps", "masked_median", "WEIGHTINGS"]

#: Allowed values of ``weighting`` in :func:`fit_ramps`.
WEIGHTINGS = ("optimal", "unweighted", "sum")


@dataclass(frozen=True)
class RampFit:
    """Result of :func:`fit_ramps`; every array has shape (ny, nx) unless said.

    Attributes
    ----------
    rate : ndarray of float64
        Count rate, e-/s (NaN where SHORT_RAMP).
    rate_variance : ndarray of float64
        Variance of ``rate``, (e-/s)**2, from read noise and Poisson noise
        (NaN where SHORT_RAMP).
    bits : ndarray of uint16
        Project flags: SATURATED, JUMP, SHORT_RAMP, NOT_FINITE.
    n_used_reads : ndarray of int
        Number of reads that enter at least one used difference.
    mean_read_time : ndarray of float64
        Mean time of the used reads, s after ``read_times[0]`` (NaN where
        SHORT_RAMP).
    jumps : ndarray of bool, shape (n_reads - 1, ny, nx)
        True where the difference from read k to read k + 1 held a jump and
        was dropped.
    """

    rate: np.ndarray
    rate_variance: np.ndarray
    bits: np.ndarray
    n_used_reads: np.ndarray
    mean_read_time: np.ndarray
    jumps: np.ndarray


def masked_median(values, mask, axis=0):
    """Median along one axis, ignoring masked elements (vectorised).

    Elements where ``mask`` is True (bad) are ignored; so are NaN values.
    The inputs are not modified.

    Parameters
    ----------
    values : array_like
        Data.
    mask : array_like of bool, same shape as ``values``
        True = ignore.
    axis : int
        Axis of the median.

    Returns
    -------
    median : ndarray
        Shape of ``values`` without ``axis``; NaN where every element along
        ``axis`` is masked.
    count : ndarray of int
        Number of unmasked elements along ``axis``.

    Notes
    -----
    Masked elements are set to +inf, the axis is sorted once and the middle
    one or two unmasked elements are averaged; it costs one sort of the
    array (faster than :func:`numpy.nanmedian` on short axes).
    """
    v = np.asarray(values, dtype=float)
    bad = np.asarray(mask, dtype=bool) | ~np.isfinite(v)
    s = np.sort(np.where(bad, np.inf, v), axis=axis)
    n = np.sum(~bad, axis=axis)
    lo = np.expand_dims(np.maximum((n - 1) // 2, 0), axis)
    hi = np.expand_dims(np.maximum(n // 2, 0), axis)
    with np.errstate(invalid="ignore"):
        med = 0.5 * (np.take_along_axis(s, lo, axis=axis) + np.take_along_axis(s, hi, axis=axis))
    med = np.squeeze(med, axis=axis)
    return np.where(n > 0, med, np.nan), n


def _solve_tridiagonal(diag, off, rhs):
    """Solve symmetric tridiagonal systems along axis 0 (Thomas algorithm).

    ``diag`` and ``rhs`` have shape (m, ...), ``off`` (m - 1, ...) holds
    C[k, k + 1].  The matrices must be positive definite (no pivoting).
    """
    m = diag.shape[0]
    cp = np.empty_like(diag)
    dp = np.empty_like(diag)
    cp[0] = off[0] / diag[0] if m > 1 else 0.0
    dp[0] = rhs[0] / diag[0]
    for k in range(1, m):
        a = off[k - 1]
        den = diag[k] - a * cp[k - 1]
        if k < m - 1:
            cp[k] = off[k] / den
        dp[k] = (rhs[k] - a * dp[k - 1]) / den
    x = np.empty_like(diag)
    x[m - 1] = dp[m - 1]
    for k in range(m - 2, -1, -1):
        x[k] = dp[k] - cp[k] * x[k + 1]
    return x


def _covariance(rate, dt, s2, use):
    """Tridiagonal covariance of the used differences; unused rows decoupled."""
    f = np.maximum(np.nan_to_num(rate, nan=0.0), 0.0)
    diag = 2.0 * s2 + f * dt.reshape((-1,) + (1,) * f.ndim)
    diag = np.where(use, np.maximum(diag, 1e-300), 1.0)
    both = use[1:] & use[:-1]
    off = np.where(both, -np.broadcast_to(s2, both.shape[1:]), 0.0)
    return diag, off


def _weights(kind, rate, dt, s2, use):
    dtb = dt.reshape((-1,) + (1,) * (use.ndim - 1)) * use
    if kind == "sum":
        return use.astype(float)
    if kind == "unweighted":
        # Read-noise-only weights (the scale of s2 cancels): ordinary least
        # squares on the reads of each segment, with a common slope.
        diag, off = _covariance(np.zeros(use.shape[1:]), dt, np.ones(use.shape[1:]), use)
    else:
        diag, off = _covariance(rate, dt, s2, use)
    return _solve_tridiagonal(diag, off, dtb)


def _check_times(read_times, n_reads):
    t = np.asarray(read_times, dtype=float)
    if t.shape != (n_reads,):
        raise ParameterError(f"read_times must have shape (n_reads,) = ({n_reads},); got {t.shape}")
    if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise ParameterError("read_times must be finite and strictly increasing (seconds after the zero read)")
    return t - t[0]


def fit_ramps(reads, read_times, *, read_noise, saturated=None, weighting="optimal",
              jump_threshold=5.0, max_jumps=3, n_iter=2, min_diffs_for_jumps=3):
    """Slope of each pixel's ramp by weighted least squares, with jumps and saturation.

    Mask contract: reads flagged in ``saturated`` (True = above the
    saturation level) are dropped, with every later read of that pixel, and
    the pixel gets SATURATED; non-finite reads are dropped (the two
    differences they enter) and the pixel gets NOT_FINITE; differences holding
    a jump are dropped (JUMP); a pixel with no usable difference left gets
    SHORT_RAMP and NaN rate and variance.  The inputs are not modified.

    Parameters
    ----------
    reads : array_like of shape (n_reads, ny, nx)
        Cumulative reads, electrons, linearised; any constant offset (bias,
        read 0) cancels.
    read_times : array_like of shape (n_reads,)
        Seconds; strictly increasing.  Times are taken relative to
        ``read_times[0]``.
    read_noise : float or array_like of shape (ny, nx)
        Read noise per read, electrons (one standard deviation).
    saturated : array_like of bool, shape (n_reads, ny, nx), optional
        True where a read is above the saturation level (the caller compares
        ADU above bias with the saturation level before linearising).
    weighting : {"optimal", "unweighted", "sum"}
        "optimal": generalised least squares with the covariance of read
        and Poisson noise at the pixel's own flux, iterated ``n_iter`` times
        (Fixsen et al. 2000); cost O(n_reads) vector operations per
        iteration.  "unweighted": ordinary least squares on the reads
        (weights from read noise only, as Rauscher et al. 2007 eq. 1
        assumes); one pass.  "sum": sum of the used differences divided by
        their total time (the read-difference estimator); cheapest.
    jump_threshold : float
        A difference is a jump when it departs from the pixel's median
        difference rate by more than this many expected sigma.
    max_jumps : int
        At most this many jumps are removed per pixel (one per pass).
    n_iter : int
        Iterations of the flux estimate inside the optimal weights.
    min_diffs_for_jumps : int
        Jumps are only searched in pixels with at least this many usable
        differences (a median of fewer is not robust).

    Returns
    -------
    RampFit
        Rate (e-/s), its variance, bits, reads used, mean time of the used
        reads, and the jump map.

    Raises
    ------
    ParameterError
        On wrong shapes, non-increasing times, negative read noise, an
        unknown ``weighting`` or a non-positive threshold.

    Notes
    -----
    Differences ``d_k`` (k = 0 .. n_reads - 2) over intervals ``dt_k`` have
    mean ``f dt_k`` and covariance (reads carry independent read noise ``s``,
    charge arrives as a Poisson process)::

        C_kk = 2 s**2 + f dt_k,   C_k,k+1 = -s**2,   else 0.

    Any linear estimator ``f_hat = sum_k x_k d_k / sum_k x_k dt_k`` is
    unbiased and has variance ``x^T C x / (sum_k x_k dt_k)**2``.  The optimal
    choice is ``x = C^{-1} dt`` (generalised least squares), for which the
    variance is ``1 / (dt^T C^{-1} dt)``; with ``f = 0`` in ``C`` it is
    ordinary least squares on the reads; ``x = 1`` is the difference sum.
    Dropped differences have ``x_k = 0``.  The variance is evaluated with the
    fitted flux in ``C`` (floored at 0).  ``C`` is tridiagonal and solved by
    the Thomas algorithm, vectorised over pixels.

    Jumps (Anderson & Gordon 2011): the residual of each difference from the
    pixel's median rate, ``d_k - median(d / dt) dt_k``, is compared with the
    expected sigma ``sqrt(2 s**2 + max(median rate, 0) dt_k)``; the worst
    difference above ``jump_threshold`` is dropped and the median recomputed,
    up to ``max_jumps`` times.

    References
    ----------
    Fixsen, D. J., et al. 2000, PASP 112, 1350.
    Rauscher, B. J., et al. 2007, PASP 119, 768.
    Anderson, R. E., & Gordon, K. D. 2011, PASP 123, 1237.
    """
    if weighting not in WEIGHTINGS:
        raise ParameterError(f"weighting must be one of {WEIGHTINGS}; got {weighting!r}")
    r = np.asarray(reads, dtype=float)
    if r.ndim != 3 or r.shape[0] < 2:
        raise ParameterError(f"reads must have shape (n_reads >= 2, ny, nx); got {r.shape}")
    if not jump_threshold > 0:
        raise ParameterError(f"jump_threshold must be > 0; got {jump_threshold}")
    if int(max_jumps) < 0 or int(n_iter) < 1:
        raise ParameterError("max_jumps must be >= 0 and n_iter >= 1")
    n_reads, ny, nx = r.shape
    t = _check_times(read_times, n_reads)
    s = np.asarray(read_noise, dtype=float)
    if np.any(~np.isfinite(s)) or np.any(s < 0):
        raise ParameterError("read_noise must be finite and >= 0 electrons")
    try:
        s2 = np.broadcast_to(s * s, (ny, nx))
    except ValueError:
        raise ParameterError(f"read_noise must be a scalar or shape ({ny}, {nx}); got {s.shape}") from None

    finite = np.isfinite(r)
    good = finite.copy()
    sat_px = np.zeros((ny, nx), dtype=bool)
    if saturated is not None:
        sat = np.asarray(saturated, dtype=bool)
        if sat.shape != r.shape:
            raise ParameterError(f"saturated must have the shape of reads {r.shape}; got {sat.shape}")
        sat = np.logical_or.accumulate(sat, axis=0)
        sat_px = sat.any(axis=0)
        good &= ~sat

    dt = np.diff(t)
    dtb = dt[:, None, None]
    valid = good[1:] & good[:-1]
    d = np.where(valid, np.diff(np.where(finite, r, 0.0), axis=0), 0.0)

    # --- jumps (Anderson & Gordon 2011) -------------------------------------
    jumps = np.zeros_like(valid)
    use = valid.copy()
    rate_ref, n_use = masked_median(d / dtb, ~use, axis=0)
    check = n_use >= int(min_diffs_for_jumps)
    for _ in range(int(max_jumps)):
        if not check.any():
            break
        sigma = np.sqrt(2.0 * s2 + np.maximum(np.nan_to_num(rate_ref), 0.0) * dtb)
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.where(use, np.abs(d - rate_ref * dtb) / sigma, 0.0)
        worst = np.argmax(z, axis=0)
        zmax = np.take_along_axis(z, worst[None], axis=0)[0]
        new = check & (zmax > jump_threshold)
        if not new.any():
            break
        yy, xx = np.nonzero(new)
        jumps[worst[yy, xx], yy, xx] = True
        use[worst[yy, xx], yy, xx] = False
        rate_ref, n_use = masked_median(d / dtb, ~use, axis=0)
        check = new & (n_use >= int(min_diffs_for_jumps))

    # --- slope -----------------------------------------------------------------
    short = ~use.any(axis=0)
    rate = np.nan_to_num(rate_ref)
    n_pass = int(n_iter) if weighting == "optimal" else 1
    for _ in range(n_pass):
        x = _weights(weighting, rate, dt, s2, use)
        den = np.sum(x * dtb, axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = np.sum(x * d, axis=0) / den
        rate = np.where(short, 0.0, rate)
    diag, off = _covariance(rate, dt, s2, use)
    xcx = np.sum(diag * x * x, axis=0) + 2.0 * np.sum(off * x[1:] * x[:-1], axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = xcx / den ** 2
    rate = np.where(short, np.nan, rate)
    var = np.where(short, np.nan, var)

    used_read = np.zeros_like(good)
    used_read[:-1] |= use
    used_read[1:] |= use
    n_used = used_read.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_t = np.where(n_used > 0, np.tensordot(t, used_read, axes=(0, 0)) / n_used, np.nan)

    bits = np.zeros((ny, nx), dtype=dq.MASK_DTYPE)
    bits[sat_px] |= dq.SATURATED
    bits[jumps.any(axis=0)] |= dq.JUMP
    bits[short] |= dq.SHORT_RAMP
    bits[~finite.all(axis=0)] |= dq.NOT_FINITE
    return RampFit(rate=rate, rate_variance=var, bits=bits, n_used_reads=n_used,
                   mean_read_time=mean_t, jumps=jumps)
