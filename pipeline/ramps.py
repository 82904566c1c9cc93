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
# the masked median moved to its own module; these names stay importable from here
from .maskedmedian import (_NETWORK_MAX, _NETWORKS, _merge_network, _middle,  # noqa: F401
                           _sorted_lanes, masked_median)

__all__ = ["RampFit", "fit_ramps", "masked_median", "WEIGHTINGS"]

#: Allowed values of ``weighting`` in :func:`fit_ramps`.
WEIGHTINGS = ("optimal", "unweighted", "sum")


@dataclass(frozen=True)
class RampFit:
    """Result of :func:`fit_ramps`; every array has shape (ny, nx) unless said.

    Attributes
    ----------
    rate : ndarray of float64
        Count rate, e-/s (NaN where NO_SLOPE).
    rate_variance : ndarray of float64
        Variance of ``rate``, (e-/s)**2, from read noise and Poisson noise
        (NaN where NO_SLOPE).
    bits : ndarray of uint16
        Project flags: OVERFILLED, RAMP_BREAK, NO_SLOPE, INVALID_VALUE.
    n_used_reads : ndarray of int
        Number of reads that enter at least one used difference.
    mean_read_time : ndarray of float64
        Mean time of the used reads, s after ``read_times[0]`` (NaN where
        NO_SLOPE).
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


def _solve_tridiagonal(diag, off, rhs):
    """Solve symmetric tridiagonal systems along axis 0 (Thomas algorithm).

    ``diag`` and ``rhs`` have shape (m, ...), ``off`` (m - 1, ...) holds
    C[k, k + 1].  The matrices must be positive definite (no pivoting).
    The intermediate arrays are written in place (same operations, fewer
    temporaries).
    """
    m = diag.shape[0]
    cp = np.empty_like(off)
    x = np.empty_like(diag)  # first the forward sweep's dp, then the solution
    den = np.empty_like(diag[0])
    tmp = np.empty_like(diag[0])
    np.divide(rhs[0], diag[0], out=x[0])
    if m > 1:
        np.divide(off[0], diag[0], out=cp[0])
    for k in range(1, m):
        a = off[k - 1]
        np.multiply(a, cp[k - 1], out=tmp)
        np.subtract(diag[k], tmp, out=den)
        if k < m - 1:
            np.divide(off[k], den, out=cp[k])
        np.multiply(a, x[k - 1], out=tmp)
        np.subtract(rhs[k], tmp, out=tmp)
        np.divide(tmp, den, out=x[k])
    for k in range(m - 2, -1, -1):
        np.multiply(cp[k], x[k + 1], out=tmp)
        np.subtract(x[k], tmp, out=x[k])
    return x


_BIG = np.finfo(float).max


def _flux_floor(rate):
    """``max(nan_to_num(rate), 0)``: NaN and -inf give 0, +inf the largest float."""
    return np.minimum(np.fmax(rate, 0.0), _BIG)


def _diagonal(rate, dtb, s2, use):
    """Diagonal of the differences' covariance, 1 on unused rows (decoupled)."""
    diag = _flux_floor(rate) * dtb  # 2 s**2 + f dt_k, built in place
    diag += 2.0 * s2
    np.maximum(diag, 1e-300, out=diag)
    np.copyto(diag, 1.0, where=~use)
    return diag


def _off_diagonal(s2, use):
    """C[k, k + 1] = -s**2 where both differences are used, else 0."""
    return np.where(use[1:] & use[:-1], -s2, 0.0)


def _weights(kind, rate, dtb, s2, use, rhs, off):
    """Weights x of the used differences; ``rhs`` = dt * use, ``off`` from :func:`_off_diagonal`."""
    if kind == "sum":
        return use.astype(float)
    if kind == "unweighted":
        # Read-noise-only weights (the scale of s2 cancels): ordinary least
        # squares on the reads of each segment, with a common slope.
        ones = np.ones(use.shape[1:])
        return _solve_tridiagonal(_diagonal(np.zeros(use.shape[1:]), dtb, ones, use),
                                  _off_diagonal(ones, use), rhs)
    return _solve_tridiagonal(_diagonal(rate, dtb, s2, use), off, rhs)


def _jump_scores(d, use, rate, s2, dtb):
    """|d_k - rate dt_k| / sigma_k of the used differences (0 elsewhere), axis 0 = differences."""
    sigma = _flux_floor(rate) * dtb  # sqrt(2 s**2 + f dt_k), built in place
    sigma += 2.0 * s2
    np.sqrt(sigma, out=sigma)
    z = rate * dtb
    np.subtract(d, z, out=z)
    np.abs(z, out=z)
    with np.errstate(invalid="ignore", divide="ignore"):
        np.divide(z, sigma, out=z)
    np.copyto(z, 0.0, where=~use)
    return z


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
    the pixel gets OVERFILLED; non-finite reads are dropped (the two
    differences they enter) and the pixel gets INVALID_VALUE; differences holding
    a jump are dropped (RAMP_BREAK); a pixel with no usable difference left gets
    NO_SLOPE and NaN rate and variance.  The inputs are not modified.

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
        sat = sat.copy()  # a read at or after a saturated one is saturated too
        for k in range(1, n_reads):
            np.logical_or(sat[k - 1], sat[k], out=sat[k])
        sat_px = sat[-1]
        good &= ~sat

    dt = np.diff(t)
    dtb = dt[:, None, None]
    valid = good[1:] & good[:-1]
    rz = r if finite.all() else np.where(finite, r, 0.0)
    d = rz[1:] - rz[:-1]
    np.copyto(d, 0.0, where=~valid)

    # --- jumps (Anderson & Gordon 2011) -------------------------------------
    # The first pass scores every pixel; a later pass only the pixels that
    # had a jump removed in the pass before (the others cannot change), and
    # the median is recomputed only where a difference was dropped.
    jumps = np.zeros_like(valid)
    use = valid.copy()
    q = d / dtb
    rate_ref, n_use = masked_median(q, ~use, axis=0)
    min_n = int(min_diffs_for_jumps)
    check = n_use >= min_n
    yy = xx = None  # pixels of the current pass after the first
    for _ in range(int(max_jumps)):
        if yy is None:
            if not check.any():
                break
            z = _jump_scores(d, use, rate_ref, s2, dtb)
            new = check & (np.max(z, axis=0) > jump_threshold)
            yy, xx = np.nonzero(new)
            worst = np.argmax(z[:, yy, xx], axis=0)
        else:
            if yy.size == 0:
                break
            z = _jump_scores(d[:, yy, xx], use[:, yy, xx], rate_ref[yy, xx], s2[yy, xx], dt[:, None])
            new = np.max(z, axis=0) > jump_threshold
            yy, xx = yy[new], xx[new]
            worst = np.argmax(z[:, new], axis=0)
        if yy.size == 0:
            break
        jumps[worst, yy, xx] = True
        use[worst, yy, xx] = False
        med, n_new = masked_median(q[:, yy, xx], ~use[:, yy, xx], axis=0)
        rate_ref[yy, xx] = med
        n_use[yy, xx] = n_new
        keep = n_new >= min_n
        yy, xx = yy[keep], xx[keep]

    # --- slope -----------------------------------------------------------------
    short = ~use.any(axis=0)
    rate = np.nan_to_num(rate_ref)
    n_pass = int(n_iter) if weighting == "optimal" else 1
    rhs = dtb * use
    off = _off_diagonal(s2, use)
    for _ in range(n_pass):
        x = _weights(weighting, rate, dtb, s2, use, rhs, off)
        den = np.sum(x * dtb, axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = np.sum(x * d, axis=0) / den
        rate = np.where(short, 0.0, rate)
    diag = _diagonal(rate, dtb, s2, use)
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
    bits[sat_px] |= dq.OVERFILLED
    bits[jumps.any(axis=0)] |= dq.RAMP_BREAK
    bits[short] |= dq.NO_SLOPE
    bits[~finite.all(axis=0)] |= dq.INVALID_VALUE
    return RampFit(rate=rate, rate_variance=var, bits=bits, n_used_reads=n_used,
                   mean_read_time=mean_t, jumps=jumps)
