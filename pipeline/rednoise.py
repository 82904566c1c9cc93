"""Errors that include correlated ("red") noise: the beta factor and residual permutation.

A least-squares covariance assumes independent errors; when the residuals of
a light-curve fit are correlated in time (imperfect systematics models,
stellar or instrumental noise on the time scale of the event), the errors it
gives are too small.  Two common second opinions:

- the **time-averaging beta factor** (Pont, Zucker & Queloz 2006; Winn et
  al. 2008): the rms of the residuals averaged in bins of N exposures,
  compared with the white-noise expectation; the ratio averaged over bin
  sizes, :math:`\\beta`, multiplies the errors when it exceeds 1
  (:func:`beta_factor`, built on the binned rms of the detrend stage);
- **residual permutation** (common practice): the best-fit model plus the
  residuals shifted cyclically by k exposures is refitted for many k, and the
  scatter of the refitted parameters is their error
  (:func:`residual_permutation`).  A shift keeps the residuals' correlation
  in time but moves it against the event and the systematics.

Masks: True where an exposure was left out of the fit; only fitted exposures
are shifted, in time order, so the fitted exposures of each permuted series
are exactly those of the original fit.  Inputs are not modified.
"""

from dataclasses import dataclass

import numpy as np

from .errors import AllMaskedError, ParameterError

__all__ = ["PermutationErrors", "beta_factor", "default_bin_sizes", "cyclic_shifts",
           "residual_permutation", "linearised_refit", "scaled_error"]


@dataclass(frozen=True)
class PermutationErrors:
    """Result of :func:`residual_permutation`.

    Attributes
    ----------
    shifts : ndarray of int, shape (n_shifts,)
        Cyclic shifts applied, in fitted exposures (0 is the original fit).
    values : ndarray of float, shape (n_shifts, n_params)
        Refitted parameters of each permuted series.
    error : ndarray of float, shape (n_params,)
        Standard deviation of ``values`` over the shifts (denominator
        n_shifts - 1).
    """

    shifts: np.ndarray
    values: np.ndarray
    error: np.ndarray


def default_bin_sizes(n_points, *, min_bins=4):
    """Bin sizes 1, 2, ... up to the largest leaving ``min_bins`` bins.

    Parameters
    ----------
    n_points : int
        Residuals available.
    min_bins : int, optional
        Least number of bins at the largest size (default 4).

    Returns
    -------
    ndarray of int
        Empty when fewer than ``2 * min_bins`` points are given.
    """
    top = int(n_points) // int(min_bins)
    return np.arange(1, top + 1) if top >= 2 else np.zeros(0, dtype=int)


def beta_factor(residuals, *, mask=None, bin_sizes=None):
    """Time-averaging beta factor of fit residuals.

    ``mask`` is True where a residual is left out (not fitted); non-finite
    residuals are left out too.

    Parameters
    ----------
    residuals : array_like of float, shape (n_exposures,)
        In time order, any unit (e.g. relative residuals divided by their
        typical error).
    mask : array_like of bool, shape (n_exposures,), optional
    bin_sizes : array_like of int, optional
        Exposures per bin; default :func:`default_bin_sizes` of the usable
        residuals (an observer may prefer sizes spanning the event's ingress).

    Returns
    -------
    beta : float
        Mean over bin sizes of (rms of binned residuals) / (white-noise
        expectation); NaN when fewer than 8 usable residuals remain.

    Notes
    -----
    The white-noise expectation of the rms of means of N residuals in M bins
    is :math:`\\sigma_1 N^{-1/2} \\sqrt{M/(M-1)}` (Pont et al. 2006; Winn et
    al. 2008); see :func:`lightledger.pipeline.diagnostics.binned_rms`.  An error
    is scaled by :math:`\\max(\\beta, 1)` (:func:`scaled_error`): beta below
    1 is the scatter of the estimate on white noise, not a reason to shrink
    an error.

    References
    ----------
    Pont, Zucker & Queloz 2006, MNRAS 373, 231; Winn et al. 2008, ApJ 683, 1076.
    """
    from .diagnostics import binned_rms

    r = np.asarray(residuals, dtype=float)
    if r.ndim != 1:
        raise ParameterError(f"residuals must be 1-D; got shape {r.shape}")
    keep = np.isfinite(r)
    if mask is not None:
        m = np.asarray(mask)
        if m.dtype != bool or m.shape != r.shape:
            raise ParameterError(f"mask must be boolean of shape {r.shape} (True = left out)")
        keep &= ~m
    sizes = default_bin_sizes(int(keep.sum())) if bin_sizes is None else bin_sizes
    if np.size(sizes) == 0:
        return float("nan")
    return float(binned_rms(r[keep], sizes).beta)


def scaled_error(error, beta):
    """``error * max(beta, 1)``; a non-finite beta leaves the error as it is."""
    b = np.asarray(beta, dtype=float)
    return np.asarray(error, dtype=float) * np.where(np.isfinite(b), np.maximum(b, 1.0), 1.0)


def cyclic_shifts(n_points, n_shifts=None):
    """Evenly spaced cyclic shifts 0 <= k < n_points, starting with 0.

    Parameters
    ----------
    n_points : int
        Length of the series, >= 2.
    n_shifts : int, optional
        How many shifts (default, and at most, ``n_points``: every shift).

    Returns
    -------
    ndarray of int, shape (n_shifts,)
    """
    n = int(n_points)
    if n < 2:
        raise ParameterError(f"residual permutation needs at least 2 fitted points; got {n}")
    k = n if n_shifts is None else int(n_shifts)
    if k < 2:
        raise ParameterError(f"n_shifts must be >= 2; got {n_shifts!r}")
    k = min(k, n)
    return np.unique(np.floor(np.arange(k) * (n / k)).astype(int))


def residual_permutation(refit, model, residuals, *, mask=None, n_shifts=None):
    """Errors from refitting the best-fit model plus cyclically shifted residuals.

    ``mask`` is True where an exposure was not fitted: those exposures keep
    the original data and take no part in the shifts.

    Parameters
    ----------
    refit : callable
        ``refit(series)`` with ``series`` of shape (n_shifts, n_exposures)
        (flux in the units of ``model``) returns the fitted parameters, shape
        (n_shifts, n_params), of each row; it fits the same exposures, with
        the same model, as the original fit.
    model : array_like of float, shape (n_exposures,)
        Best-fit model of the original fit.
    residuals : array_like of float, shape (n_exposures,)
        Data minus ``model``, same units.
    mask : array_like of bool, shape (n_exposures,), optional
    n_shifts : int, optional
        Number of shifts (default: every one of the fitted exposures; fewer,
        evenly spaced, bound the cost).

    Returns
    -------
    PermutationErrors

    Notes
    -----
    For shift k the fitted exposures :math:`i_1 < \\dots < i_n` receive
    :math:`m_{i_j} + r_{i_{(j+k) \\bmod n}}`.  The spread of the refitted
    parameters over k is the permutation error (common practice; the
    "prayer bead").  On white noise it estimates the least-squares error,
    with a scatter of its own that grows with the event's duration over the
    visit's (few independent shifts span a long event); on correlated noise
    it grows with the correlation.

    Cost: that of ``refit`` on n_shifts series.
    """
    m = np.asarray(model, dtype=float)
    r = np.asarray(residuals, dtype=float)
    if m.ndim != 1 or r.shape != m.shape:
        raise ParameterError(f"model and residuals must be 1-D of one shape; got {m.shape}, {r.shape}")
    use = np.isfinite(r) & np.isfinite(m)
    if mask is not None:
        mk = np.asarray(mask)
        if mk.dtype != bool or mk.shape != m.shape:
            raise ParameterError(f"mask must be boolean of shape {m.shape} (True = not fitted)")
        use &= ~mk
    idx = np.flatnonzero(use)
    if idx.size < 2:
        raise AllMaskedError("fewer than two fitted exposures to permute")
    shifts = cyclic_shifts(idx.size, n_shifts)
    ru = r[idx]
    series = np.broadcast_to(m + r, (shifts.size, m.size)).copy()
    order = (np.arange(idx.size)[None, :] + shifts[:, None]) % idx.size
    series[:, idx] = m[idx][None, :] + ru[order]
    values = np.asarray(refit(series), dtype=float)
    if values.ndim == 1:
        values = values[:, None]
    if values.shape[0] != shifts.size:
        raise ParameterError(f"refit must return one row per series ({shifts.size}); "
                             f"got shape {values.shape}")
    return PermutationErrors(shifts=shifts, values=values,
                             error=np.std(values, axis=0, ddof=1))


def linearised_refit(jacobian, weights, parameters, model, *, fitted=None):
    """A refit for :func:`residual_permutation` by one Gauss-Newton step from the best fit.

    Parameters
    ----------
    jacobian : array_like of float, shape (n_exposures, n_params)
        Derivatives of the model with respect to every parameter at the best
        fit (nonlinear ones included, e.g. with respect to a log time scale).
    weights : array_like of float, shape (n_exposures,)
        :math:`1/\\sigma^2` of each exposure.
    parameters : array_like of float, shape (n_params,)
        Best-fit parameters.
    model : array_like of float, shape (n_exposures,)
        Best-fit model.
    fitted : array_like of bool, shape (n_exposures,), optional
        True where an exposure was fitted (default all).

    Returns
    -------
    callable
        ``refit(series)`` for series of shape (n_shifts, n_exposures),
        returning parameters of shape (n_shifts, n_params).

    Notes
    -----
    :math:`p_k = \\hat p + (J^T W J)^{-1} J^T W (y_k - \\hat m)`, solved
    through the singular value decomposition of the weighted, column-scaled
    Jacobian.  For a model linear in its parameters this is the exact refit;
    for a bilinear systematics-times-event model the neglected terms are of
    second order in the residuals (relative 1e-4 for light curves at the
    1e-4 level), far below the spread being measured.  Cost: one SVD, then
    O(n_shifts n_exposures n_params).
    """
    J = np.asarray(jacobian, dtype=float)
    w = np.asarray(weights, dtype=float)
    p = np.asarray(parameters, dtype=float)
    m = np.asarray(model, dtype=float)
    n = m.size
    if J.ndim != 2 or J.shape[0] != n or p.shape != (J.shape[1],) or w.shape != (n,):
        raise ParameterError("jacobian (n_exposures, n_params), weights and model (n_exposures,) "
                             "and parameters (n_params,) must agree in shape")
    use = np.ones(n, dtype=bool) if fitted is None else np.asarray(fitted, dtype=bool)
    sw = np.sqrt(np.where(use, w, 0.0))
    Jw = J * sw[:, None]
    norm = np.sqrt(np.sum(Jw * Jw, axis=0))
    norm = np.where(norm > 0, norm, 1.0)
    U, sv, Vt = np.linalg.svd(Jw / norm, full_matrices=False)
    keep = sv > max(Jw.shape) * np.finfo(float).eps * (sv[0] if sv.size else 0.0)
    inv = np.where(keep, 1.0 / np.where(keep, sv, 1.0), 0.0)
    G = (Vt.T * inv) @ U.T / norm[:, None]          # (n_params, n_exposures), weighted rows

    def refit(series):
        d = (np.asarray(series, dtype=float) - m[None, :]) * sw[None, :]
        d = np.where(use[None, :], d, 0.0)
        return p[None, :] + d @ G.T

    return refit
