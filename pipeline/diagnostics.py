"""Diagnostics of fit residuals: the time-averaging test, beta, rms summaries.

Residuals are in any unit, in time order; ``mask`` is True where a residual is
bad.  Inputs are not modified.
"""

from dataclasses import dataclass

import numpy as np

from .argchecks import vector as _vector
from .errors import AllMaskedError, ParameterError

__all__ = ["BinnedRms", "binned_rms", "ResidualQuality", "residual_quality"]


@dataclass(frozen=True)
class BinnedRms:
    """Time-averaging test; returned by :func:`binned_rms`.

    Attributes
    ----------
    bin_sizes : ndarray of int, shape (n_sizes,)
        Exposures per bin, N.
    n_bins : ndarray of int, shape (n_sizes,)
        Number of bins, M.
    rms : ndarray of float, shape (n_sizes,)
        Sample standard deviation of the bin means, sigma_N.
    expected : ndarray of float, shape (n_sizes,)
        White-noise expectation ``sigma_1 / sqrt(N) * sqrt(M / (M - 1))``.
    ratio : ndarray of float, shape (n_sizes,)
        ``rms / expected``.
    beta : float
        Mean of ``ratio`` over the bin sizes (not clipped at 1).
    sigma_1 : float
        Sample standard deviation of the unbinned residuals.
    """

    bin_sizes: np.ndarray
    n_bins: np.ndarray
    rms: np.ndarray
    expected: np.ndarray
    ratio: np.ndarray
    beta: float
    sigma_1: float


def binned_rms(residuals, bin_sizes, *, mask=None):
    """Rms of binned residuals against bin size, and the beta factor.

    ``mask`` is True where a residual is bad; bad and non-finite residuals
    are removed before binning (the remaining ones are binned in order, so a
    bin may span a removed exposure or an orbit gap).  Consecutive bins of N
    residuals are averaged; a remainder shorter than N is left out.

    Parameters
    ----------
    residuals : array_like of float, shape (n_exposures,)
        In time order, any unit.
    bin_sizes : array_like of int
        Exposures per bin, each >= 1 and giving at least 2 bins.
    mask : array_like of bool, shape (n_exposures,), optional

    Returns
    -------
    BinnedRms

    Notes
    -----
    For independent residuals of variance :math:`\\sigma^2`, the mean of
    :math:`N` has variance :math:`\\sigma^2/N`.  The published white-noise
    expectation is :math:`\\sigma_N = \\sigma_1 N^{-1/2} \\sqrt{M/(M-1)}`
    (Pont et al. 2006; Winn et al. 2008), computed here with
    :math:`\\sigma_1` and :math:`\\sigma_N` the sample standard deviations
    (denominators :math:`n-1` and :math:`M-1`).  With these estimators
    :math:`E[\\sigma_N^2] = \\sigma^2/N` exactly, so for white noise
    :math:`E[\\mathrm{ratio}^2] \\approx (M-1)/M`: the published factor makes
    the expectation conservative by up to :math:`\\sqrt{M/(M-1)}` (6 per
    cent at M = 10).  The beta factor is the mean ratio over bin sizes
    (Winn et al. 2008); values above 1 indicate correlated noise.

    References
    ----------
    Pont, Zucker & Queloz 2006, MNRAS 373, 231; Winn et al. 2008, ApJ 683, 1076.

    Cost: every size at once from one cumulative sum, :math:`O(n \\log n)`
    time and memory for the sizes 1 to n/4 (:func:`_binned_std`), where
    averaging bin by bin, one size at a time, took :math:`O(n^2)` time.
    """
    r = _vector(residuals, "residuals")
    if mask is not None:
        m = np.asarray(mask)
        if m.dtype != bool or m.shape != r.shape:
            raise ParameterError(f"mask must be boolean of shape {r.shape} (True = bad)")
        r = r[~m]
    r = r[np.isfinite(r)]
    if r.size < 2:
        raise AllMaskedError("fewer than two finite, unmasked residuals")
    sizes = np.atleast_1d(np.asarray(bin_sizes))
    if sizes.ndim != 1 or sizes.size < 1 or not np.all(sizes == np.round(sizes)) or np.any(sizes < 1):
        raise ParameterError("bin_sizes must be integers >= 1")
    sizes = sizes.astype(int)
    n_bins = r.size // sizes
    if np.any(n_bins < 2):
        raise ParameterError(f"bin_sizes must give at least 2 bins of the {r.size} residuals; "
                             f"largest allowed is {r.size // 2}")
    sigma_1 = float(np.std(r, ddof=1))
    rms = _binned_std(r, sizes, n_bins)
    expected = sigma_1 / np.sqrt(sizes) * np.sqrt(n_bins / (n_bins - 1.0))
    ratio = rms / expected
    return BinnedRms(bin_sizes=sizes, n_bins=n_bins, rms=rms, expected=expected, ratio=ratio,
                     beta=float(np.mean(ratio)), sigma_1=sigma_1)


def _binned_std(r, sizes, n_bins):
    """Sample standard deviation of the means of consecutive bins, for every bin size at once.

    Bin sums are differences of one cumulative sum of the residuals less
    their mean (the shift leaves every standard deviation unchanged and keeps
    the running sum near zero, so a difference loses at most ~1e-14 of a bin
    sum to rounding); the means of all sizes sit in one array of
    ``sum(n_bins)`` values, and each size's standard deviation (denominator
    ``M - 1``) is a two-pass grouped sum over it.

    Parameters
    ----------
    r : ndarray of float, shape (n,)
    sizes, n_bins : ndarray of int, shape (n_sizes,)
        Exposures per bin N and bins M = n // N (each M >= 2).

    Returns
    -------
    ndarray of float, shape (n_sizes,)
    """
    c = np.concatenate([[0.0], np.cumsum(r - np.mean(r))])
    group = np.repeat(np.arange(sizes.size), n_bins)
    first = np.cumsum(n_bins) - n_bins                       # each size's first bin
    k = np.arange(group.size) - first[group]                 # bin index within its size
    N = sizes[group]
    means = (c[(k + 1) * N] - c[k * N]) / N
    centre = np.bincount(group, means, sizes.size) / n_bins
    dev = means - centre[group]
    return np.sqrt(np.bincount(group, dev * dev, sizes.size) / (n_bins - 1.0))


@dataclass(frozen=True)
class ResidualQuality:
    """Summary of a fit's residuals; returned by :func:`residual_quality`.

    Attributes
    ----------
    rms : float
        Root mean square of the used residuals (relative units).
    rms_dof : float
        ``rms * sqrt(n / (n - n_params))``: comparable with the noise.
    expected : float
        Root mean square of the used errors.
    beta : float
        Time-averaging beta factor (:func:`binned_rms`, bins of 1 to n/4
        exposures), NaN for fewer than 12 residuals.
    n_used : int
    """

    rms: float
    rms_dof: float
    expected: float
    beta: float
    n_used: int


def residual_quality(residuals, errors, used, n_params):
    """Rms of the residuals, the rms expected from the errors, and beta.

    Parameters
    ----------
    residuals, errors : array_like of float, shape (n_exposures,)
        Relative residuals and errors (e.g. ``DetrendResult.residuals`` and
        ``detrended_error``).
    used : array_like of bool, shape (n_exposures,)
        True where the exposure entered the fit.
    n_params : int
        Free parameters of the fit.

    Returns
    -------
    ResidualQuality

    Notes
    -----
    The rms of least-squares residuals underestimates the noise by
    :math:`\\sqrt{(n - p)/n}` for :math:`p` fitted parameters (common
    practice); ``rms_dof`` undoes it.  Beta is computed on the residuals
    divided by the median error.

    References
    ----------
    Pont, Zucker & Queloz 2006, MNRAS 373, 231; Winn et al. 2008, ApJ 683, 1076.
    """
    used = np.asarray(used, bool)
    r = np.asarray(residuals, float)[used]
    e = np.asarray(errors, float)[used]
    rms = float(np.sqrt(np.mean(r ** 2))) if r.size else np.nan
    expected = float(np.sqrt(np.mean(e ** 2))) if e.size else np.nan
    beta = np.nan
    if r.size >= 12:
        sizes = np.arange(1, r.size // 4 + 1)
        beta = float(binned_rms(r / np.median(e), sizes).beta)
    n = int(used.sum())
    return ResidualQuality(rms=rms, rms_dof=rms * np.sqrt(n / max(n - n_params, 1)),
                           expected=expected, beta=beta, n_used=n)
