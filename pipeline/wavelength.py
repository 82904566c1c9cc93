"""Wavelength solution per column, its refinement on a model, and alignment.

The instrument profile gives the dispersion polynomial
``lambda(x) = sum_k c_k (x - x_ref)^k`` (micrometres) in full-detector
columns, ``x = subarray column + origin_x`` (``origin_x`` is the file's
sub-array origin), and ``x_ref = source_x + column_offset``.  Pixel ``i`` of
the sub-array spans columns ``[i - 0.5, i + 0.5]``.

The zero point (and optionally the scale) is refined by least squares of the
visit's median spectrum against a model given on a wavelength grid
(throughput x Planck x d lambda / dx, electrons per pixel up to a factor),
which is the cross-correlation peak of the two for a free amplitude.  The
shift convention is that of :mod:`lightledger.pipeline.drift`: the observed
spectrum is ``a * model(lambda_0(u(x)))`` with
``u(x) = x_ref + (1 + b) (x - x_ref) - shift``, so the refined solution is
``lambda(x) = lambda_0(u(x))``.

References
----------
Deming, D., et al. 2013, ApJ 774, 95 (shift and stretch of spectra).
Carnall, A. C. 2017, arXiv:1705.05165 (flux-conserving resampling).
"""

from dataclasses import dataclass

import numpy as np
from numpy.polynomial import Polynomial

from .errors import AllMaskedError, ParameterError
from .resample import resample

__all__ = ["WavelengthFit", "reference_column", "column_wavelengths", "pixel_edges",
           "refine_solution", "align_spectra"]


@dataclass(frozen=True)
class WavelengthFit:
    """Refined dispersion polynomial.

    Attributes
    ----------
    coefficients : ndarray
        Refined ``c_k`` about the same ``x_ref``, micrometres per column^k.
    shift : float
        Pixel shift of the observed spectrum against the nominal solution
        (positive = features at larger columns).
    scale : float
        Fractional stretch b of the column axis about ``x_ref`` (0 if not
        fitted).
    shift_error : float
        1-sigma error of ``shift``, pixels.
    amplitude : float
        Fitted ratio of the observed spectrum to the model.
    """

    coefficients: np.ndarray
    shift: float
    scale: float
    shift_error: float
    amplitude: float


def reference_column(source_x, column_offset):
    """Reference column ``x_ref = source_x + column_offset`` (full-detector columns)."""
    return float(source_x) + float(column_offset)


def _coefficients(coefficients):
    c = np.asarray(coefficients, dtype=float)
    if c.ndim != 1 or c.size < 1 or not np.all(np.isfinite(c)):
        raise ParameterError("coefficients: must be a finite 1-D sequence c_0, c_1, ... (um)")
    return c


def column_wavelengths(columns, coefficients, x_ref, *, origin_x=0):
    """Wavelength at sub-array ``columns`` (fractional allowed), micrometres.

    Parameters
    ----------
    columns : array_like
        Sub-array columns.
    coefficients : sequence of float
        ``c_k`` of ``lambda = sum_k c_k (x - x_ref)^k``, um per column^k.
    x_ref : float
        Reference full-detector column.
    origin_x : int, keyword-only
        Full-detector column of the sub-array's column 0.

    Returns
    -------
    ndarray
        Same shape as ``columns``.
    """
    c = _coefficients(coefficients)
    x = np.asarray(columns, dtype=float) + float(origin_x) - float(x_ref)
    return np.polynomial.polynomial.polyval(x, c)


def pixel_edges(n_columns, coefficients, x_ref, *, origin_x=0):
    """Wavelengths of the ``n_columns + 1`` pixel edges, micrometres.

    Raises ParameterError when the solution is not strictly increasing over
    the sub-array (the resampler needs increasing edges).

    Returns
    -------
    ndarray of shape (n_columns + 1,)
    """
    n = int(n_columns)
    if n < 1:
        raise ParameterError(f"n_columns: must be an integer >= 1, got {n_columns}")
    edges = column_wavelengths(np.arange(n + 1) - 0.5, coefficients, x_ref, origin_x=origin_x)
    if np.any(np.diff(edges) <= 0):
        raise ParameterError("coefficients: the wavelength must increase with column "
                             "over the sub-array")
    return edges


def refine_solution(spectrum, model_wavelength, model_flux, coefficients, x_ref, *,
                    origin_x=0, variance=None, mask=None, fit_scale=False,
                    max_shift=10.0, step=0.25, n_iter=20):
    """Refine the zero point (and scale) of the solution against a model.

    Columns where ``mask`` is True, non-finite columns and columns whose
    wavelength falls outside the model grid are left out.  Raises
    AllMaskedError when fewer than 4 columns remain.  Inputs are not
    modified.

    Parameters
    ----------
    spectrum : array_like of shape (n_columns,)
        Median spectrum of the visit, electrons per column.
    model_wavelength : array_like of shape (n_model,)
        Strictly increasing wavelengths of the model, um.
    model_flux : array_like of shape (n_model,)
        Model per pixel (throughput x Planck x d lambda / dx), any scale.
    coefficients : sequence of float
        Nominal ``c_k``, um per column^k.
    x_ref : float
        Reference full-detector column.
    origin_x : int, keyword-only
        Full-detector column of sub-array column 0.
    variance : array_like of shape (n_columns,), optional
        Variance of ``spectrum``, e-^2 (weights); default uniform weights.
    mask : array_like of bool, shape (n_columns,), optional
        True = bad column.
    fit_scale : bool
        Also fit the stretch b of the column axis.
    max_shift : float
        Half-range of the coarse grid search of the shift, pixels.
    step : float
        Step of the coarse grid, pixels.
    n_iter : int
        Gauss-Newton iterations after the grid search.

    Returns
    -------
    WavelengthFit

    Notes
    -----
    For a trial shift the amplitude that minimises
    ``chi^2 = sum w (s - a m)^2`` is ``a = sum w s m / sum w m^2``; the grid
    minimum of chi^2 starts Gauss-Newton on (a, shift[, b]) with numerical
    derivatives of the model; the shift error is the square root of the
    diagonal of ``(J^T W J)^-1`` (times the reduced chi-square without a
    variance).  The refined coefficients are those of the composed polynomial
    ``lambda_0(x_ref + (1 + b) X - shift)`` in ``X = x - x_ref``.
    """
    s = np.asarray(spectrum, dtype=float)
    if s.ndim != 1:
        raise ParameterError(f"spectrum: expected shape (n_columns,), got {s.shape}")
    mw = np.asarray(model_wavelength, dtype=float)
    mf = np.asarray(model_flux, dtype=float)
    if mw.ndim != 1 or mw.shape != mf.shape or mw.size < 2:
        raise ParameterError("model_wavelength, model_flux: must be 1-D of the same length >= 2")
    if np.any(np.diff(mw) <= 0) or not np.all(np.isfinite(mf)):
        raise ParameterError("model_wavelength: must be strictly increasing, model_flux finite")
    c = _coefficients(coefficients)
    nx = s.size
    good = np.isfinite(s)
    if mask is not None:
        good &= ~np.asarray(mask, dtype=bool)
    if variance is not None:
        var = np.asarray(variance, dtype=float)
        good &= np.isfinite(var) & (var > 0)
        w0 = np.where(good, 1.0 / np.where(good, var, 1.0), 0.0)
    else:
        w0 = good.astype(float)
    s0 = np.where(good, s, 0.0)
    X = np.arange(nx) + float(origin_x) - float(x_ref)          # x - x_ref

    def model(shift, b):
        # shift, b: arrays (n,) -> model (n, nx) and in-range mask
        u = (1.0 + b)[:, None] * X[None, :] - shift[:, None]
        lam = np.polynomial.polynomial.polyval(u, c)
        inside = (lam >= mw[0]) & (lam <= mw[-1])
        return np.interp(lam, mw, mf), inside

    def amp_chi2(m, w):
        den = (w * m * m).sum(axis=1)
        a = np.where(den > 0, (w * m * s0).sum(axis=1) / np.where(den > 0, den, 1.0), 0.0)
        return a, (w * (s0 - a[:, None] * m) ** 2).sum(axis=1)

    grid = np.arange(-float(max_shift), float(max_shift) + 0.5 * step, float(step))
    m, inside = model(grid, np.zeros_like(grid))
    w = w0[None, :] * inside
    if np.any(w.sum(axis=1) <= 0) and not np.any(w.sum(axis=1) > 0):
        raise AllMaskedError("spectrum: no good column falls on the model grid")
    a, chi2 = amp_chi2(m, w)
    # compare trials on the columns that all of them cover
    common = w0 * inside.all(axis=0)
    if (common > 0).sum() >= 4:
        a, chi2 = amp_chi2(m, np.broadcast_to(common, m.shape))
    j = int(np.argmin(chi2))
    p = np.array([a[j], grid[j], 0.0])
    n_par = 3 if fit_scale else 2
    h = 1e-3
    cov = np.full((n_par, n_par), np.nan)
    for _ in range(int(n_iter)):      # solver iterations
        sh, b = np.array([p[1]]), np.array([p[2]])
        m0, ins = model(sh, b)
        w = w0 * ins[0]
        if (w > 0).sum() < 4:
            raise AllMaskedError("spectrum: fewer than 4 good columns on the model grid")
        mp, _ = model(sh + h, b)
        mm, _ = model(sh - h, b)
        jac = [m0[0], p[0] * (mp[0] - mm[0]) / (2 * h)]
        if fit_scale:
            bp, _ = model(sh, b + h * 1e-3)
            bm, _ = model(sh, b - h * 1e-3)
            jac.append(p[0] * (bp[0] - bm[0]) / (2 * h * 1e-3))
        jac = np.stack(jac, axis=1)
        normal = jac.T @ (w[:, None] * jac)
        rhs = jac.T @ (w * (s0 - p[0] * m0[0]))
        try:
            dp = np.linalg.solve(normal, rhs)
            cov = np.linalg.inv(normal)
        except np.linalg.LinAlgError:
            raise AllMaskedError("spectrum: the wavelength fit is singular (featureless model?)") from None
        dp[1] = np.clip(dp[1], -1.0, 1.0)
        p[:n_par] += dp
        if abs(dp[1]) < 1e-8:
            break
    m0, ins = model(np.array([p[1]]), np.array([p[2]]))
    w = w0 * ins[0]
    if variance is None:
        dof = max(int((w > 0).sum()) - n_par, 1)
        cov = cov * (w * (s0 - p[0] * m0[0]) ** 2).sum() / dof
    new = Polynomial(c)(Polynomial([-p[1], 1.0 + p[2]]))
    coef = np.zeros(c.size)
    coef[: new.coef.size] = new.coef[: c.size]
    return WavelengthFit(coefficients=coef, shift=float(p[1]), scale=float(p[2]),
                         shift_error=float(np.sqrt(abs(cov[1, 1]))), amplitude=float(p[0]))


def align_spectra(flux, shift, *, variance=None, mask=None, stretch=None, x0=None):
    """Move each exposure's spectrum onto the reference pixel grid.

    With the convention of :mod:`lightledger.pipeline.drift`, column x of
    exposure e sits at reference column ``u = x0 + (1 + b_e)(x - x0) -
    shift_e``; its pixel edges are mapped so and the integrated electrons are
    resampled onto the reference pixels with
    :func:`lightledger.pipeline.resample.resample`.  Columns where ``mask``
    is True spoil the reference pixels they overlap, and reference pixels not
    fully covered are masked.  Inputs are not modified.

    Parameters
    ----------
    flux : array_like of shape (n_exposures, n_columns)
        Integrated electrons per column.
    shift : array_like of shape (n_exposures,)
        Shift of each exposure, pixels.
    variance : array_like, same shape as ``flux``, optional
        e-^2.
    mask : array_like of bool, same shape as ``flux``, optional
        True = bad column.
    stretch : array_like of shape (n_exposures,), optional
        Fractional stretch b; default 0.
    x0 : float, optional
        Centre of the stretch; default the middle column.

    Returns
    -------
    lightledger.pipeline.resample.Resampled
        On the reference pixels (whose wavelength edges are
        :func:`pixel_edges`).

    Notes
    -----
    See :func:`lightledger.pipeline.resample.resample` for the variance
    (squared overlap weights, no covariance).
    """
    f = np.asarray(flux, dtype=float)
    if f.ndim == 1:
        f = f[np.newaxis]
    if f.ndim != 2:
        raise ParameterError(f"flux: expected shape (n_exposures, n_columns), got {f.ndim} dimensions")
    n_exp, nx = f.shape
    sh = np.broadcast_to(np.asarray(shift, dtype=float), (n_exp,))
    b = np.zeros(n_exp) if stretch is None else np.broadcast_to(np.asarray(stretch, float), (n_exp,))
    if not (np.all(np.isfinite(sh)) and np.all(np.isfinite(b)) and np.all(b > -1)):
        raise ParameterError("shift, stretch: must be finite, stretch > -1")
    x0 = (nx - 1) / 2.0 if x0 is None else float(x0)
    e = np.arange(nx + 1) - 0.5
    old = x0 + (1.0 + b)[:, None] * (e - x0)[None, :] - sh[:, None]
    return resample(old, f, e, variance=variance, mask=mask, kind="integrated")
