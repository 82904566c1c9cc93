"""Per-exposure drifts: spectral shift (and stretch), spatial shift, width, scan length.

Spectra are 1-D, electrons per column, shape ``(n_exposures, n_columns)``; a
boolean ``mask`` is True where a column is bad and is left out of every sum.
Inputs are never modified.

Sign convention (shared with :mod:`lightledger.pipeline.wavelength`): an
exposure ``s`` is modelled as ``s(x) = a * R(u(x))`` with the reference ``R``
and ``u(x) = x0 + (1 + b) (x - x0) - shift``.  A positive ``shift`` moves the
features toward larger columns; ``b`` is the stretch about column ``x0``.

Two methods, both vectorised over exposures:

- ``"xcorr"``: normalised cross-correlation on whole-pixel lags, peak refined
  by the parabola through the three highest lags.  Cost O(n_exposures n_lags
  n_columns).  The parabola's peak is biased toward whole pixels by up to a
  few hundredths of a pixel for sharp features.
- ``"fit"`` (default): the parabola's result refined by Gauss-Newton least
  squares of the scaled, shifted and optionally stretched reference,
  interpolated by a cubic spline (shift and stretch, Deming et al. 2013).
  Cost O(n_iter n_exposures n_columns); unbiased to first order.

References
----------
Deming, D., et al. 2013, ApJ 774, 95.
"""

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from .errors import AllMaskedError, ParameterError
from .trace import column_centroids, scan_band

__all__ = ["SpectralShift", "SpatialShift", "spectral_shift", "spatial_shift",
           "scan_length"]

_METHODS = ("fit", "xcorr")


@dataclass(frozen=True)
class SpectralShift:
    """Alignment of each exposure's spectrum with the reference.

    Attributes
    ----------
    shift : ndarray of shape (n_exposures,)
        Shift along the dispersion, pixels (positive = toward larger columns).
    stretch : ndarray of shape (n_exposures,)
        Fractional stretch b about ``x0`` (0 when not fitted).
    scale : ndarray of shape (n_exposures,)
        Flux ratio a of exposure to reference.
    shift_error : ndarray of shape (n_exposures,)
        1-sigma error of ``shift`` from the least-squares covariance, pixels
        (scaled by the reduced chi-square when no variance is given; NaN for
        ``"xcorr"``).
    x0 : float
        Column about which the stretch acts.
    method : str
        ``"fit"`` or ``"xcorr"``.
    """

    shift: np.ndarray
    stretch: np.ndarray
    scale: np.ndarray
    shift_error: np.ndarray
    x0: float
    method: str


@dataclass(frozen=True)
class SpatialShift:
    """Position and width of the trace across the rows in each exposure.

    Attributes
    ----------
    centroid : ndarray of shape (n_exposures,)
        Row centroid of the profile collapsed along the dispersion, rows.
    shift : ndarray of shape (n_exposures,)
        ``centroid - reference``, rows.
    width : ndarray of shape (n_exposures,)
        Gaussian sigma from the Sheppard-corrected second moment, rows.
    """

    centroid: np.ndarray
    shift: np.ndarray
    width: np.ndarray


def _as_spectra(name, a):
    a = np.asarray(a, dtype=float)
    if a.ndim == 1:
        a = a[np.newaxis]
    if a.ndim != 2:
        raise ParameterError(f"{name}: expected shape (n_exposures, n_columns), got {a.ndim} dimensions")
    return a


def _xcorr(spec, good, ref, max_lag):
    """Parabola-refined peak of the normalised cross-correlation."""
    n_exp, nx = spec.shape
    lags = np.arange(-max_lag, max_lag + 1)
    pad = np.concatenate([np.zeros(max_lag), ref, np.zeros(max_lag)])
    pad_ok = np.concatenate([np.zeros(max_lag, bool), np.ones(nx, bool), np.zeros(max_lag, bool)])
    # shifted[j, x] = ref[x - lag_j]
    win = np.lib.stride_tricks.sliding_window_view(pad, nx)[::-1]
    win_ok = np.lib.stride_tricks.sliding_window_view(pad_ok, nx)[::-1]
    w = good[:, None, :] & win_ok[None, :, :]                           # (e, lag, x)
    n = w.sum(axis=2)
    s = np.where(w, spec[:, None, :], 0.0)
    r = np.where(w, win[None, :, :], 0.0)
    s = s - np.where(w, s.sum(axis=2, keepdims=True) / np.maximum(n, 1)[..., None], 0.0)
    r = r - np.where(w, r.sum(axis=2, keepdims=True) / np.maximum(n, 1)[..., None], 0.0)
    den = np.sqrt((s ** 2).sum(axis=2) * (r ** 2).sum(axis=2))
    ccf = np.where(den > 0, (s * r).sum(axis=2) / np.where(den > 0, den, 1.0), -np.inf)
    j = np.clip(np.argmax(ccf, axis=1), 1, len(lags) - 2)
    e = np.arange(n_exp)
    cm, c0, cp = ccf[e, j - 1], ccf[e, j], ccf[e, j + 1]
    curv = cm - 2 * c0 + cp
    frac = np.where(np.isfinite(curv) & (curv < 0), 0.5 * (cm - cp) / np.where(curv < 0, curv, -1.0), 0.0)
    return lags[j] + np.clip(frac, -1.0, 1.0)


def spectral_shift(spectra, reference, *, variance=None, mask=None, method="fit",
                   fit_stretch=False, max_shift=5, x0=None, n_iter=10):
    """Shift (and stretch) of each exposure's spectrum against a reference.

    Columns where ``mask`` is True, non-finite columns and columns whose
    shifted reference falls outside the reference are left out.  Raises
    AllMaskedError when an exposure has fewer good columns than parameters.
    Inputs are not modified.

    Parameters
    ----------
    spectra : array_like of shape (n_exposures, n_columns) or (n_columns,)
        Electrons per column.
    reference : array_like of shape (n_columns,)
        Reference spectrum (e.g. the visit's median), electrons per column.
    variance : array_like, same shape as ``spectra``, optional
        Variance of ``spectra``, e-^2; weights of the fit.
    mask : array_like of bool, same shape as ``spectra``, optional
        True = bad column.
    method : {"fit", "xcorr"}
        See the module docstring.
    fit_stretch : bool
        Also fit the stretch b (``"fit"`` only).
    max_shift : int
        Largest whole-pixel lag searched by the cross-correlation, pixels.
    x0 : float, optional
        Centre of the stretch, column; default the middle column.
    n_iter : int
        Gauss-Newton iterations.

    Returns
    -------
    SpectralShift

    Notes
    -----
    Gauss-Newton minimises ``chi^2 = sum w (s - a R(u))^2`` with
    ``w = 1 / variance`` (or 1).  The Jacobian columns are ``R(u)``,
    ``-a R'(u)`` for the shift and ``a R'(u) (x - x0)`` for the stretch; the
    covariance of the parameters is ``(J^T W J)^-1``, multiplied by
    ``chi^2 / (n - p)`` when no variance is given.
    """
    if method not in _METHODS:
        raise ParameterError(f"method: must be one of {_METHODS}, got {method!r}")
    spec = _as_spectra("spectra", spectra)
    ref = np.asarray(reference, dtype=float)
    n_exp, nx = spec.shape
    if ref.shape != (nx,):
        raise ParameterError(f"reference: expected shape ({nx},), got {ref.shape}")
    if not np.all(np.isfinite(ref)):
        raise ParameterError("reference: must be finite everywhere")
    max_shift = int(max_shift)
    if not 1 <= max_shift < nx // 2:
        raise ParameterError(f"max_shift: must be an integer in [1, {nx // 2 - 1}], got {max_shift}")
    good = np.isfinite(spec)
    if mask is not None:
        good &= ~_as_spectra("mask", mask).astype(bool)
    if variance is not None:
        var = _as_spectra("variance", variance)
        if var.shape != spec.shape:
            raise ParameterError(f"variance: shape {var.shape} must equal spectra shape {spec.shape}")
        good &= np.isfinite(var) & (var > 0)
        wgt0 = np.where(good, 1.0 / np.where(good, var, 1.0), 0.0)
    else:
        wgt0 = good.astype(float)
    if np.any(good.sum(axis=1) < 4):
        raise AllMaskedError("spectra: an exposure has fewer than 4 good columns")
    s = np.where(good, spec, 0.0)
    x0 = (nx - 1) / 2.0 if x0 is None else float(x0)

    shift = _xcorr(s, good, ref, max_shift)
    stretch = np.zeros(n_exp)
    x = np.arange(nx, dtype=float)
    spline = CubicSpline(x, ref)
    dspline = spline.derivative()

    def _scale(u, w):
        rr = spline(u)
        den = (w * rr * rr).sum(axis=1)
        return np.where(den > 0, (w * rr * s).sum(axis=1) / np.where(den > 0, den, 1.0), 0.0)

    u = x0 + (x - x0)[None, :] - shift[:, None]
    w = wgt0 * ((u >= 0) & (u <= nx - 1))
    scale = _scale(u, w)
    if method == "xcorr":
        return SpectralShift(shift=shift, stretch=stretch, scale=scale,
                             shift_error=np.full(n_exp, np.nan), x0=x0, method=method)

    n_par = 3 if fit_stretch else 2
    cov = np.zeros((n_exp, n_par, n_par))
    for _ in range(int(n_iter)):     # iterations of the solver, not pixels
        u = x0 + (1.0 + stretch)[:, None] * (x - x0)[None, :] - shift[:, None]
        inside = (u >= 0) & (u <= nx - 1)
        w = wgt0 * inside
        rr = spline(u)
        dr = dspline(u)
        model = scale[:, None] * rr
        jac = [rr, -scale[:, None] * dr]
        if fit_stretch:
            jac.append(scale[:, None] * dr * (x - x0)[None, :])
        jac = np.stack(jac, axis=-1)                                   # (e, x, p)
        normal = np.einsum("exp,ex,exq->epq", jac, w, jac)
        rhs = np.einsum("exp,ex,ex->ep", jac, w, s - model)
        try:
            step = np.linalg.solve(normal, rhs[..., None])[..., 0]
            cov = np.linalg.inv(normal)
        except np.linalg.LinAlgError:
            raise AllMaskedError("spectra: the shift fit is singular (flat spectrum?)") from None
        scale = scale + step[:, 0]
        shift = shift + np.clip(step[:, 1], -1.0, 1.0)
        if fit_stretch:
            stretch = stretch + step[:, 2]
        if np.all(np.abs(step[:, 1]) < 1e-7):
            break
    u = x0 + (1.0 + stretch)[:, None] * (x - x0)[None, :] - shift[:, None]
    w = wgt0 * ((u >= 0) & (u <= nx - 1))
    resid = s - scale[:, None] * spline(u)
    if variance is None:
        dof = np.maximum((w > 0).sum(axis=1) - n_par, 1)
        cov = cov * ((w * resid ** 2).sum(axis=1) / dof)[:, None, None]
    return SpectralShift(shift=shift, stretch=stretch, scale=scale,
                         shift_error=np.sqrt(np.abs(cov[:, 1, 1])), x0=x0, method=method)


def spatial_shift(flux, mask=None, *, reference=None, half_window=5.0):
    """Row centroid, shift and width of the trace in each exposure.

    The frame is collapsed along the dispersion (mean of the good pixels of
    each row; pixels where ``mask`` is True or non-finite are left out), and
    the windowed first and second moments of that row profile are measured.
    For a tilted trace the collapsed profile is broadened by the tilt; use
    :func:`lightledger.pipeline.trace.refine` for widths measured per column.
    Inputs are not modified.

    Parameters
    ----------
    flux : array_like of shape (n_exposures, n_rows, n_columns)
        Background-subtracted electrons.
    mask : array_like of bool, same shape, optional
        True = bad pixel.
    reference : float, optional
        Reference row of ``shift``; default the median centroid.
    half_window : float
        Half-width of the centroid window, rows.

    Returns
    -------
    SpatialShift
    """
    flux = np.asarray(flux, dtype=float)
    if flux.ndim == 2:
        flux = flux[np.newaxis]
        mask = None if mask is None else np.asarray(mask, bool)[np.newaxis]
    if flux.ndim != 3:
        raise ParameterError(f"flux: expected shape (n_exposures, n_rows, n_columns), got {flux.ndim} dimensions")
    good = np.isfinite(flux)
    if mask is not None:
        good &= ~np.asarray(mask, dtype=bool)
    if not good.any():
        raise AllMaskedError("flux: every pixel is masked or non-finite")
    n = good.sum(axis=2)
    prof = np.where(n > 0, np.where(good, flux, 0.0).sum(axis=2) / np.maximum(n, 1), 0.0)
    cen, sig, _ = column_centroids(prof[:, :, None], half_window=half_window)
    cen, sig = cen[:, 0], sig[:, 0]
    ref = np.nanmedian(cen) if reference is None else float(reference)
    return SpatialShift(centroid=cen, shift=cen - ref, width=sig)


def scan_length(flux, mask=None, *, level=0.5):
    """Length of the band a scanned source crossed in each exposure, rows.

    A thin wrapper of :func:`lightledger.pipeline.trace.scan_band` (same mask
    contract); returns an ndarray of shape (n_exposures,).
    """
    return scan_band(flux, mask, level=level).length
