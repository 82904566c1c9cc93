"""A fit's depth error three ways: covariance, beta factor, residual permutation.

For a light-curve fit of :func:`lightledger.pipeline.eventfit.fit_event`
(systematics times an event, :math:`f = S(1 - \\delta s)` or, with the
planet's flux, :math:`f = S_*(1 + F_p(1 - s))`) this module rebuilds the
Jacobian of the model at the solution with respect to every fitted
parameter, including nonlinear shape parameters of the systematics and of
the event's geometry held at their chosen values, and from it

- the **covariance** error of the depth (scaled by the square root of the
  reduced chi-square when it exceeds 1, common practice), marginalised to
  first order over the nonlinear parameters whose derivatives are given;
- the **beta** error: the covariance error times the time-averaging factor
  :math:`\\max(\\beta, 1)` of the residuals (Pont et al. 2006; Winn et al.
  2008; :func:`lightledger.pipeline.rednoise.beta_factor`);
- the **permutation** error: the scatter of the depth over refits of the
  best-fit model plus cyclically shifted residuals (common practice;
  :func:`lightledger.pipeline.rednoise.residual_permutation`), refitted by
  one Gauss-Newton step from the solution with the full Jacobian, so that the
  nonlinear parameters move too.

Masks: a fit's ``fit_mask`` (True = not fitted) decides which exposures
enter.  Inputs are not modified.
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError
from .leastsq import weighted_lstsq
from .rednoise import beta_factor, linearised_refit, residual_permutation

__all__ = ["FitLinearisation", "DepthErrors", "ERROR_KINDS", "linearise_fit", "depth_errors",
           "depth_response", "inherited_variance", "event_alone_error"]

#: Width (in its logarithm) of the Gaussian that holds each shape parameter (a time
#: scale) near its chosen value in the linearised errors: a time scale the light
#: curve does not constrain contributes the depth's change over a factor e**2, not
#: a first-order extrapolation over many e-folds.
SHAPE_LOG_PRIOR = 2.0

#: Depth errors a product may carry.
ERROR_KINDS = ("covariance", "beta", "permutation", "largest")


@dataclass(frozen=True)
class FitLinearisation:
    """The model of a fit, linearised at its solution; returned by :func:`linearise_fit`.

    Attributes
    ----------
    jacobian : ndarray of float, shape (n_exposures, n_params)
        Derivatives of the model flux with respect to the basis coefficients
        (constant first), the depth (or the planet's flux coefficients), then
        each nonlinear parameter given.
    parameters : ndarray of float, shape (n_params,)
        The solution (nonlinear parameters as 0: offsets from their values).
    depth_gradient : ndarray of float, shape (n_params,)
        Derivative of the depth with respect to the parameters.
    weights : ndarray of float, shape (n_exposures,)
        :math:`1/\\sigma^2`.
    fitted : ndarray of bool, shape (n_exposures,)
        True where the exposure entered the fit.
    blocks : tuple of int
        Columns of ``jacobian`` per kind: (basis with the constant, depth or
        planet coefficients, shape parameters, event parameters).
    """

    jacobian: np.ndarray
    parameters: np.ndarray
    depth_gradient: np.ndarray
    weights: np.ndarray
    fitted: np.ndarray
    blocks: tuple = ()

    def _system(self, prior=True):
        """The fitted rows of the Jacobian and their weights, with (``prior``) one row per
        shape parameter holding it within :data:`SHAPE_LOG_PRIOR` of its value."""
        use = self.fitted
        J, w = self.jacobian[use], self.weights[use]
        ns = self.blocks[2] if self.blocks and prior else 0
        if ns:
            first = self.blocks[0] + self.blocks[1]
            rows = np.zeros((ns, J.shape[1]))
            rows[np.arange(ns), first + np.arange(ns)] = 1.0
            J = np.concatenate([J, rows])
            w = np.concatenate([w, np.full(ns, SHAPE_LOG_PRIOR ** -2)])
        return J, w

    def covariance(self, scale=1.0, prior=True):
        """Covariance of the parameters, :math:`(J^T W J + P)^{-1}` times ``scale**2``
        (``P`` the shape parameters' prior precision, 0 without ``prior``)."""
        J, w = self._system(prior)
        _, cov = weighted_lstsq(J, np.zeros(J.shape[0]), w)
        return cov * float(scale) ** 2

    def depth_variance(self, prior=True):
        """Unscaled variance of the depth from :meth:`covariance` on the fitted exposures."""
        g = self.depth_gradient
        return float(g @ self.covariance(prior=prior) @ g)


def linearise_fit(result, basis, template, variance, *, basis_derivatives=None,
                  template_derivatives=None, planet_basis=None, planet_at_event=None):
    """Jacobian of a :func:`~lightledger.pipeline.eventfit.fit_event` result at its solution.

    Parameters
    ----------
    result : DetrendResult
        The fit (its ``coefficients``, ``depth``, ``fit_mask``).
    basis : array_like of float, shape (n_exposures, n_basis)
        The systematics columns the fit used, without the constant.
    template : array_like of float, shape (n_exposures,)
        The event template the fit used.
    variance : array_like of float, shape (n_exposures,)
        The variance the fit used.
    basis_derivatives : array_like of float, shape (n_shapes, n_exposures, n_basis), optional
        Derivatives of the columns with respect to nonlinear shape parameters.
    template_derivatives : array_like of float, shape (n_geometry, n_exposures), optional
        Derivatives of the template with respect to nonlinear event
        parameters (mid-time, a/Rs, inclination).
    planet_basis, planet_at_event : optional
        As given to the fit, for an eclipse hiding the planet's flux.

    Returns
    -------
    FitLinearisation

    Notes
    -----
    Without the planet's flux, :math:`f = S(1 - \\delta s)`, :math:`S = B a`:
    :math:`\\partial f/\\partial a_k = B_k(1 - \\delta s)`,
    :math:`\\partial f/\\partial\\delta = -S s`, :math:`\\partial
    f/\\partial\\theta = (D_\\theta a)(1 - \\delta s)` for a shape parameter and
    :math:`-S\\delta\\,\\partial s/\\partial g` for an event parameter.  With it,
    :math:`f = S_*(1 + F_p v)`, :math:`v = 1 - s`, :math:`F_p = P c`:
    :math:`B_k(1 + F_p v)`, :math:`S_* P_j v`, :math:`(D_\\theta a)(1 + F_p v)` and
    :math:`-S_* F_p\\,\\partial s/\\partial g`; the depth
    :math:`F_m/(1 + F_m)` has gradient :math:`P_m/(1 + F_m)^2` in :math:`c`.
    """
    s = np.asarray(template, dtype=float)
    n = s.size
    B_extra = np.asarray(basis, dtype=float).reshape(n, -1)
    B = np.concatenate([np.ones((n, 1)), B_extra], axis=1)
    nb = B.shape[1]
    coef = np.asarray(result.coefficients, dtype=float)
    a = coef[:nb]
    D = (np.zeros((0, n, nb)) if basis_derivatives is None else
         np.concatenate([np.zeros((len(basis_derivatives), n, 1)),
                         np.asarray(basis_derivatives, dtype=float).reshape(-1, n, nb - 1)], axis=2))
    G = np.zeros((0, n)) if template_derivatives is None else \
        np.asarray(template_derivatives, dtype=float).reshape(-1, n)
    D = np.where(np.isfinite(D), D, 0.0)
    S = B @ a
    if planet_basis is not None:
        P = np.asarray(planet_basis, dtype=float).reshape(n, -1)
        c = coef[nb:nb + P.shape[1]]
        if c.size != P.shape[1]:
            raise ParameterError("the fit's coefficients do not include the planet's columns")
        v = 1.0 - s
        F = P @ c
        event = 1.0 + F * v
        cols = [B * event[:, None], S[:, None] * P * v[:, None]]
        p_mid = np.asarray(planet_at_event, dtype=float)
        F_m = float(p_mid @ c)
        grad_event = p_mid / (1.0 + F_m) ** 2
        params = [a, c]
        geo = -(S * F)[None, :] * G
    else:
        event = 1.0 - result.depth * s
        cols = [B * event[:, None], (-S * s)[:, None]]
        grad_event = np.ones(1)
        params = [a, np.array([result.depth])]
        geo = -(S * result.depth)[None, :] * G
    shape_cols = np.einsum("jnk,k->nj", D, a) * event[:, None] if D.shape[0] else np.zeros((n, 0))
    J = np.concatenate(cols + [shape_cols, geo.T], axis=1)
    J = np.where(np.isfinite(J), J, 0.0)
    n_nl = shape_cols.shape[1] + geo.shape[0]
    p = np.concatenate(params + [np.zeros(n_nl)])
    grad = np.concatenate([np.zeros(nb), grad_event, np.zeros(n_nl)])
    var = np.asarray(variance, dtype=float)
    fitted = ~np.asarray(result.fit_mask, bool)
    w = np.where(fitted, 1.0 / np.where(fitted, var, 1.0), 0.0)
    return FitLinearisation(jacobian=J, parameters=p, depth_gradient=grad, weights=w,
                            fitted=fitted, blocks=(nb, len(grad_event), shape_cols.shape[1],
                                                   geo.shape[0]))


def event_alone_error(linearisation):
    """Depth error the fit would have with nothing but a constant beside the event.

    From the linearisation's constant and depth columns only (unscaled): the
    reference against which a systematics model's depth error says how far
    the model's columns trade with the event (the square of their ratio is the
    depth's variance inflation factor, common practice for collinear
    regressors).  With the planet's flux fitted, the planet's columns stand
    in for the depth.

    Returns
    -------
    float
    """
    nb, ne = linearisation.blocks[:2] if linearisation.blocks else (1, 1)
    use = linearisation.fitted
    cols = np.r_[0, np.arange(nb, nb + ne)]
    J = linearisation.jacobian[use][:, cols]
    _, cov = weighted_lstsq(J, np.zeros(int(use.sum())), linearisation.weights[use])
    g = linearisation.depth_gradient[cols]
    return float(np.sqrt(max(g @ cov @ g, 0.0)))


def depth_response(linearisation):
    r"""How the fitted depth moves with the data: :math:`h` with :math:`\Delta\delta = h \cdot \Delta f`.

    For a least-squares fit linearised at its solution,
    :math:`h = g^T (J^T W J)^{-1} J^T W` (``g`` the depth's gradient in the
    parameters; exposures not fitted get 0).  A change of anything the fit
    held fixed that moves the data-minus-model residual by :math:`\Delta r`
    moves the depth by :math:`h \cdot \Delta r` (first order; common
    practice for the propagation of errors through a linear estimator).

    Returns
    -------
    ndarray of float, shape (n_exposures,)
    """
    use = linearisation.fitted
    J = linearisation.jacobian[use]
    w = linearisation.weights[use]
    cov = linearisation.covariance()
    h = np.zeros(use.size)
    h[use] = (linearisation.depth_gradient @ cov @ J.T) * w
    return h


def inherited_variance(response, sources):
    r"""Variance a fit's depth inherits from the errors of parameters another fit gave it.

    A channel fitted with quantities taken from the white light curve (its
    systematics divided out as a common mode, the ramp and trap time scales,
    the mid-time) has a depth error conditional on them; their own errors,
    shared by every channel, add

    .. math:: \sigma^2 = \sum_s a_s C_s a_s^T, \qquad a_s = h R_s,

    where :math:`h` is the depth's response to the data
    (:func:`depth_response`), :math:`R_s` the change of the fit's residual
    per unit of source :math:`s`'s parameters and :math:`C_s` their
    covariance (first-order propagation of errors, common practice; the
    sources taken as independent).

    Parameters
    ----------
    response : ndarray of float, shape (n_exposures,)
        :func:`depth_response` of the fit.
    sources : sequence of (ndarray (n_exposures, n_params), ndarray (n_params, n_params))
        :math:`R_s` (non-finite entries count as 0) and :math:`C_s`.

    Returns
    -------
    float
        The inherited variance (>= 0).
    """
    h = np.asarray(response, float)
    total = 0.0
    for R, C in sources:
        R = np.asarray(R, float).reshape(h.size, -1)
        a = h @ np.where(np.isfinite(R), R, 0.0)
        total += float(a @ np.asarray(C, float) @ a)
    return max(total, 0.0)


@dataclass(frozen=True)
class DepthErrors:
    """The depth error of one fit three ways; returned by :func:`depth_errors`.

    Attributes
    ----------
    covariance : float
        From the covariance, times ``sqrt(reduced chi2)`` when that exceeds 1.
    beta : float
        ``covariance * max(beta_factor, 1)``.
    beta_factor : float
        Time-averaging factor of the residuals (NaN with too few residuals,
        then ``beta`` equals ``covariance``).
    permutation : float
        Scatter of the depth over cyclic shifts of the residuals (NaN when
        not computed).
    n_shifts : int
    """

    covariance: float
    beta: float
    beta_factor: float
    permutation: float
    n_shifts: int

    def pick(self, kind):
        """The error of ``kind`` (one of :data:`ERROR_KINDS`); "largest" is the largest finite one."""
        if kind not in ERROR_KINDS:
            raise ParameterError(f"depth error kind must be one of {', '.join(ERROR_KINDS)}; "
                                 f"got {kind!r}")
        if kind == "largest":
            vals = [v for v in (self.covariance, self.beta, self.permutation) if np.isfinite(v)]
            return float(max(vals)) if vals else float("nan")
        value = getattr(self, kind)
        return float(value) if np.isfinite(value) else float(self.covariance)


def depth_errors(result, linearisation, flux, *, n_shifts=100, depth_error=None, inherited=0.0):
    """Covariance, beta and permutation errors of a fit's depth.

    Parameters
    ----------
    result : DetrendResult
        The fit (``model``, ``residuals``, ``detrended_error``,
        ``fit_mask``, ``depth``, ``error_scale``).
    linearisation : FitLinearisation
        :func:`linearise_fit` of the same fit.
    flux : array_like of float, shape (n_exposures,)
        The flux the fit used (divided by any common mode).
    n_shifts : int, optional
        Cyclic shifts for the permutation error (at most the fitted
        exposures; 0 = not computed).
    depth_error : float, optional
        Covariance error to report (default ``result.depth_error``).
    inherited : float, optional
        Variance the depth inherits from parameters taken from another fit
        (:func:`inherited_variance`), added to each of the three errors.

    Returns
    -------
    DepthErrors
    """
    cov_err = float(result.depth_error if depth_error is None else depth_error)
    fitted = linearisation.fitted
    rel = np.asarray(result.residuals, float) / np.asarray(result.detrended_error, float)
    beta = beta_factor(rel, mask=~fitted) if fitted.sum() >= 8 else float("nan")
    beta_err = cov_err * (max(beta, 1.0) if np.isfinite(beta) else 1.0)
    perm = float("nan")
    shifts = 0
    if n_shifts and fitted.sum() >= 4:
        model = np.asarray(result.model, float)
        refit = linearised_refit(linearisation.jacobian, linearisation.weights,
                                 linearisation.parameters, model, fitted=fitted)
        g = linearisation.depth_gradient
        p0 = linearisation.parameters

        def depth_of(series):
            return (refit(series) - p0[None, :]) @ g + result.depth

        pe = residual_permutation(depth_of, model, np.asarray(flux, float) - model,
                                  mask=~fitted, n_shifts=int(n_shifts))
        perm = float(pe.error[0])
        shifts = int(pe.shifts.size)
    extra = max(float(inherited), 0.0)
    if extra > 0:
        cov_err, beta_err, perm = (float(np.sqrt(x * x + extra)) for x in (cov_err, beta_err, perm))
    return DepthErrors(covariance=cov_err, beta=float(beta_err), beta_factor=float(beta),
                       permutation=perm, n_shifts=shifts)
