"""Weighted least squares: the linear solve and the bilinear Gauss-Newton fit.

Two kernels on plain arrays, shared by every light-curve fit:
:func:`weighted_lstsq` solves a weighted linear problem by the singular value
decomposition of the weighted, column-normalised design matrix and returns
the covariance from the same decomposition; :func:`gauss_newton_bilinear`
fits the product model ``f = (B a)(1 + Q c)`` (systematics times an event)
and returns the covariance marginalised, to first order, over nonlinear
parameters of ``B`` held fixed.

Weights are inverse variances; every array is already restricted to the
exposures being fitted (no masks here).  Inputs are not modified.
"""

import numpy as np

__all__ = ["weighted_lstsq", "gauss_newton_bilinear"]

_EPS = float(np.finfo(float).eps)


def weighted_lstsq(A, y, w, *, sw=None, covariance=True):
    """Weighted linear least squares by SVD; returns (coefficients, covariance).

    Parameters
    ----------
    A : ndarray of float, shape (n_points, n_params)
        Design matrix.
    y : ndarray of float, shape (n_points,)
        Data.
    w : ndarray of float, shape (n_points,)
        Weights, inverse variances of ``y``.
    sw : ndarray of float, shape (n_points,), optional
        ``sqrt(w)``, when the caller already has it (a solve repeated with
        the same weights).
    covariance : bool, optional
        False: the covariance is not computed (None is returned in its place).

    Returns
    -------
    coefficients : ndarray of float, shape (n_params,)
    covariance : ndarray of float, shape (n_params, n_params), or None
        :math:`(A^T W A)^{-1}` restricted to the resolved directions.

    Notes
    -----
    The columns of the weighted design matrix are scaled to unit norm and
    the problem is solved by its singular value decomposition, never by the
    normal equations: for a basis mixing a flux-sized constant with nearly
    degenerate low-order columns (a short visit's phase sinusoids against its
    polynomial and the eclipse) the normal matrix has a condition number
    beyond 1e19, and a pseudo-inverse of it silently drops exactly the
    poorly constrained directions, whose variance is the one that matters.
    Singular values below ``max(shape) * eps`` of the largest (the rank
    convention of numpy's ``lstsq``) are treated as exactly degenerate
    directions and left out (minimum-norm solution in the scaled
    coordinates).
    """
    if sw is None:
        sw = np.sqrt(w)
    Aw = A * sw[:, None]
    norm = np.sqrt((Aw * Aw).sum(axis=0))
    norm = np.where(norm > 0, norm, 1.0)
    U, sv, Vt = np.linalg.svd(Aw / norm, full_matrices=False)
    keep = sv > max(Aw.shape) * _EPS * (sv[0] if sv.size else 0.0)
    inv = np.where(keep, 1.0 / np.where(keep, sv, 1.0), 0.0)
    coef = (Vt.T @ (inv * (U.T @ (y * sw)))) / norm
    if not covariance:
        return coef, None
    cov = ((Vt.T * inv ** 2) @ Vt) / np.outer(norm, norm)
    return coef, cov


def gauss_newton_bilinear(fu, wu, Bu, Qu, Du, max_iter):
    """Weighted fit of ``f = (B a)(1 + Q c)``; returns (a, c, covariance of (a, c)).

    Parameters
    ----------
    fu, wu : ndarray of float, shape (n_fit,)
        Fitted fluxes and their weights (inverse variances).
    Bu : ndarray of float, shape (n_fit, k)
        Systematics design matrix, constant column included.
    Qu : ndarray of float, shape (n_fit, m)
        Event columns: the event factor is ``1 + Q c``.
    Du : ndarray of float, shape (n_nonlinear, n_fit, k)
        Derivatives of ``Bu`` with respect to nonlinear parameters held fixed
        (n_nonlinear may be 0).
    max_iter : int
        Gauss-Newton iterations at most.

    Notes
    -----
    Starts from the linearised solution ``f ~ B a + Q c'`` with
    ``c' ~ S c`` and iterates Gauss-Newton steps with step halving.  The
    covariance is marginalised over the nonlinear parameters whose basis
    derivatives are ``Du`` (shape (n_nonlinear, n_fit, n_basis)).
    """
    k, m = Bu.shape[1], Qu.shape[1]
    sw = np.sqrt(wu)            # every solve below has the same weights
    p_lin, _ = weighted_lstsq(np.concatenate([Bu, Qu], axis=1), fu, wu, sw=sw, covariance=False)
    a = p_lin[:k]
    S_u = Bu @ a
    wq = wu[:, None] * Qu * Qu
    num, den = (wq * S_u[:, None]).sum(axis=0), wq.sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(den > 0, num / den, 0.0)
        c = np.where(scale != 0, p_lin[k:] / scale, 0.0)
    # The systematics, event factor, residual and chi-square of the current
    # (a, c); an accepted step's trial values are those of the next iterate.
    E_u = 1.0 + Qu @ c
    r = fu - S_u * E_u
    chi_now = (wu * r * r).sum()
    for _ in range(int(max_iter)):
        J = np.concatenate([Bu * E_u[:, None], S_u[:, None] * Qu], axis=1)
        step, _ = weighted_lstsq(J, r, wu, sw=sw, covariance=False)
        # Step halving guards against an overshoot far from the minimum.
        lam = 1.0
        for _h in range(30):
            a_try, c_try = a + lam * step[:k], c + lam * step[k:]
            S_try = Bu @ a_try
            E_try = 1.0 + Qu @ c_try
            r_try = fu - S_try * E_try
            chi_try = (wu * r_try * r_try).sum()
            if chi_try <= chi_now * (1 + 1e-15) + 1e-300:
                break
            lam *= 0.5
        a, c, S_u, E_u, r, chi_now = a_try, c_try, S_try, E_try, r_try, chi_try
        size = (np.abs(lam * step) / np.maximum(np.abs(np.concatenate((a, c))), 1e-300)).max()
        if size < 1e-13 or np.abs(lam * step[k:]).max() < 1e-15:
            break
    G = (Du @ a).T * E_u[:, None]          # d f / d theta_j
    J = np.concatenate([Bu * E_u[:, None], S_u[:, None] * Qu, G], axis=1)
    _, cov = weighted_lstsq(J, np.zeros(fu.size), wu, sw=sw)
    return a, c, cov[:k + m, :k + m]
