"""The record of a light-curve fit: :class:`DetrendResult`, its assembly, :func:`with_shapes`.

:func:`_assemble` turns the solution of :func:`lightledger.pipeline.eventfit.fit_event`
(coefficients, the covariance of the linear parameters) into the depth, its
covariance and the per-exposure models; :func:`with_shapes` counts the shape
parameters chosen from the data as free parameters.  See
:mod:`lightledger.pipeline.eventfit` for the model.
"""

import dataclasses
from dataclasses import dataclass

import numpy as np

__all__ = ["DetrendResult", "with_shapes"]


@dataclass(frozen=True)
class DetrendResult:
    """A light-curve fit; returned by :func:`fit_event` and :func:`detrend_light_curve`.

    Attributes
    ----------
    depth : float
        Event depth :math:`\\delta` (dimensionless; see the module notes); with
        the planet's flux fitted (``planet_basis``), :math:`F_p/(1 + F_p)` at
        mid-eclipse.
    depth_error : float
        Standard error of ``depth``, multiplied by ``error_scale``.
    depth_error_unscaled : float
        Standard error from the given variances alone.
    error_scale : float
        ``sqrt(reduced_chi2)`` when the reduced chi-square exceeds 1, else 1.
    reduced_chi2 : float
        ``chi2 / (n_points - n_params)``.
    systematics : ndarray of float, shape (n_exposures,)
        :math:`S`, the systematics model in flux units (includes :math:`F_0`):
        the model's out-of-event flux (with the planet's flux,
        :math:`S_* (1 + F_p)`).
    model : ndarray of float, shape (n_exposures,)
        :math:`S (1 - \\delta s)` (with the planet's flux,
        :math:`S_* (1 + F_p (1 - s))`).
    detrended_flux : ndarray of float, shape (n_exposures,)
        ``flux / systematics`` (1 out of the event).
    detrended_error : ndarray of float, shape (n_exposures,)
        ``sqrt(variance) / systematics``.
    residuals : ndarray of float, shape (n_exposures,)
        ``detrended_flux - model / systematics`` (``1 - depth * template``
        without the planet's flux), relative units.
    coefficients : ndarray of float, shape (n_columns,)
        :math:`a_k` of the basis columns (the first is :math:`F_0`, or the
        star's flux :math:`F_*` with the planet's flux), followed by the
        planet's :math:`c_j` when fitted; 0 for a column that is zero on every
        fitted exposure.
    coefficient_names : tuple of str
    covariance : ndarray of float, shape (n_columns + 1, n_columns + 1)
        Unscaled covariance of (coefficients, depth), marginalised over any
        nonlinear parameter whose derivatives were given; rows and columns of
        dropped columns are 0.
    chi2 : float
        Weighted sum of squared residuals over the fitted exposures.
    bic : float
        ``chi2 + n_params * ln(n_points)`` (Schwarz 1978; chi2 equals
        -2 ln L up to a constant for Gaussian errors of known variance).
    n_params : int
        Free parameters: used basis columns + depth (+ 1 for a ramp time
        scale chosen from a grid or fitted).
    n_points : int
        Exposures in the fit.
    fit_mask : ndarray of bool, shape (n_exposures,)
        True where an exposure was left out of the fit.
    tau : float
        Ramp time scale used, days; NaN without a ramp.
    mode : str
        "joint" or "out_of_event".
    shapes : tuple of (str, float)
        Shape parameters of the systematics model chosen from the data
        (qualified names such as ``"ramp.tau"``), empty when none.
    star : ndarray of float, shape (n_exposures,) or None
        With the planet's flux fitted (``planet_basis``), :math:`S_* = B a`:
        the star alone times the systematics; None otherwise.
    shapes_at_edge : tuple of str
        Shape parameters whose chosen value is still at an end of its grid
        after the grid was extended
        (:attr:`~lightledger.pipeline.shapesearch.ShapeSearch.at_edge`).
    """

    depth: float
    depth_error: float
    depth_error_unscaled: float
    error_scale: float
    reduced_chi2: float
    systematics: np.ndarray
    model: np.ndarray
    detrended_flux: np.ndarray
    detrended_error: np.ndarray
    residuals: np.ndarray
    coefficients: np.ndarray
    coefficient_names: tuple
    covariance: np.ndarray
    chi2: float
    bic: float
    n_params: int
    n_points: int
    fit_mask: np.ndarray
    tau: float
    mode: str
    shapes: tuple = ()
    star: np.ndarray | None = None
    shapes_at_edge: tuple = ()


def _assemble(f, v, use, B, a, c, cov_ac, Q, P, p_mid, active, p_active, nb, n_planet,
              names, mode):
    """Depth, its covariance, the per-exposure models and the result record."""
    k, m = B.shape[1], Q.shape[1]
    tied = P is not None
    S = B @ a                      # S (no planet term) or S_* (with the planet's flux)
    event = 1.0 + Q @ c            # model / S
    model = S * event
    if tied:
        systematics = S * (1.0 + P @ c)
        f_mid = float(p_mid @ c)
        delta = f_mid / (1.0 + f_mid)
        h = np.zeros(k + m)
        h[k:] = p_mid / (1.0 + f_mid) ** 2
        cov = np.zeros((k + m + 1,) * 2)
        cov[:k + m, :k + m] = cov_ac
        cov[:k + m, -1] = cov[-1, :k + m] = cov_ac @ h
        cov[-1, -1] = var_depth = float(h @ cov_ac @ h)
    else:
        systematics = S
        delta = float(c[0])
        cov, var_depth = cov_ac, cov_ac[k, k]
    fu, wu = f[use], 1.0 / v[use]
    n_fit = fu.size
    resid_u = fu - model[use]
    chi2 = float(np.sum(wu * resid_u * resid_u))
    n_params = k + m
    dof = n_fit - n_params
    red = chi2 / dof
    err = float(np.sqrt(var_depth))
    scale_err = float(np.sqrt(red)) if red > 1 else 1.0
    n_coef = nb + n_planet
    coef = np.zeros(n_coef)
    idx = np.flatnonzero(active)
    if tied:
        idx = np.append(idx, nb + np.flatnonzero(p_active))
        coef[idx] = np.append(a, c)
    else:
        coef[idx] = a
    full_cov = np.zeros((n_coef + 1,) * 2)
    idx = np.append(idx, n_coef)
    full_cov[np.ix_(idx, idx)] = cov
    with np.errstate(divide="ignore", invalid="ignore"):
        detr = f / systematics
        detr_err = np.sqrt(v) / np.abs(systematics)
        rel_model = model / systematics if tied else event
    return DetrendResult(
        depth=float(delta), depth_error=err * scale_err, depth_error_unscaled=err,
        error_scale=scale_err, reduced_chi2=float(red), systematics=systematics, model=model,
        detrended_flux=detr, detrended_error=detr_err, residuals=detr - rel_model,
        coefficients=coef, coefficient_names=names, covariance=full_cov, chi2=chi2,
        bic=float(chi2 + n_params * np.log(n_fit)), n_params=int(n_params),
        n_points=n_fit, fit_mask=~use, tau=float("nan"), mode=mode, star=S if tied else None)


def with_shapes(result, shapes, tau=float("nan"), at_edge=()):
    """Copy of ``result`` with its shape parameters counted as free parameters.

    Parameters
    ----------
    result : DetrendResult
        A fit at fixed shape parameters.
    shapes : dict of str to float
        The shape parameters chosen from the data (qualified names); each
        adds one to ``n_params`` and so changes the reduced chi-square, the
        error scale and the BIC.
    tau : float, optional
        The ramp time scale to report as ``tau`` (days), NaN without a ramp.
    at_edge : tuple of str, optional
        Shape parameters left at an end of their grid (``shapes_at_edge``).

    Returns
    -------
    DetrendResult
    """
    n_params = result.n_params + len(shapes)
    dof = result.n_points - n_params
    red = result.chi2 / dof if dof > 0 else np.inf
    scale = float(np.sqrt(red)) if red > 1 else 1.0
    return dataclasses.replace(
        result, tau=float(tau), n_params=int(n_params), reduced_chi2=float(red),
        error_scale=scale, depth_error=result.depth_error_unscaled * scale,
        bic=float(result.chi2 + n_params * np.log(result.n_points)),
        shapes=tuple((str(k), float(v)) for k, v in shapes.items()),
        shapes_at_edge=tuple(str(n) for n in at_edge))
