"""Ranking systematics models by information criteria and marginalising over them.

When several systematics models describe a light curve about equally well,
a depth from the best one alone hides the uncertainty of the choice.  Each
model :math:`q` fitted by least squares with :math:`k_q` free parameters to
:math:`n` points gets

.. math:: \\mathrm{BIC}_q = \\chi^2_q + k_q \\ln n, \\qquad
          \\mathrm{AIC}_q = \\chi^2_q + 2 k_q

(Schwarz 1978; Akaike 1974; for Gaussian errors of known variance
:math:`\\chi^2 = -2 \\ln L` up to a constant shared by the models), a weight

.. math:: W_q = \\frac{e^{-\\mathrm{IC}_q/2}}{\\sum_r e^{-\\mathrm{IC}_r/2}}

(the criterion standing in for :math:`-2 \\ln` of the model's evidence;
Gibson 2014, Wakeford et al. 2016), and any parameter :math:`x` fitted by
every model is marginalised as

.. math:: \\bar x = \\sum_q W_q x_q, \\qquad
          \\sigma_{\\bar x}^2 = \\sum_q W_q \\left[\\sigma_q^2 + (x_q - \\bar x)^2\\right],

the weighted mean and an error that adds the spread between the models to
each model's own error (Wakeford et al. 2016, eqs. 15-16, from memory).

With prior probabilities :math:`p_q` of the models (e.g. the weights the
white light curve gave the same models, for a channel fitted at the white
light's systematics), :math:`W_q \\propto p_q e^{-\\mathrm{IC}_q/2}`: Bayes'
theorem with the criterion standing in for the evidence.

Models that failed (non-finite criterion) get weight 0.  The criteria must
come from fits to the same points: comparing them across different data is
meaningless, so the functions here only see numbers and the caller keeps
that promise.  Inputs are not modified.

References
----------
Schwarz, G. 1978, Ann. Stat. 6, 461 (BIC); Akaike, H. 1974, IEEE Trans.
Autom. Control 19, 716 (AIC); Gibson, N. P. 2014, MNRAS 445, 3401;
Wakeford, H. R. et al. 2016, ApJ 819, 10.
"""

from dataclasses import dataclass

import numpy as np

from .errors import AllMaskedError, ParameterError

__all__ = ["CRITERIA", "Marginalised", "information_criteria", "model_weights", "marginalise"]

#: The criteria :func:`model_weights` accepts by name.
CRITERIA = ("bic", "aic")


@dataclass(frozen=True)
class Marginalised:
    """A parameter marginalised over models; returned by :func:`marginalise`.

    Attributes
    ----------
    value : ndarray of float, shape (...)
        Weighted mean :math:`\\bar x` over the models.
    error : ndarray of float, shape (...)
        :math:`\\sqrt{\\sum_q W_q [\\sigma_q^2 + (x_q - \\bar x)^2]}`.
    within : ndarray of float, shape (...)
        :math:`\\sqrt{\\sum_q W_q \\sigma_q^2}`: the models' own errors alone.
    between : ndarray of float, shape (...)
        :math:`\\sqrt{\\sum_q W_q (x_q - \\bar x)^2}`: the spread between models.
    """

    value: np.ndarray
    error: np.ndarray
    within: np.ndarray
    between: np.ndarray


def information_criteria(chi2, n_params, n_points):
    """BIC and AIC of least-squares fits.

    Parameters
    ----------
    chi2 : array_like of float
        Weighted sum of squared residuals of each fit (:math:`-2\\ln L` up to a
        constant for Gaussian errors).
    n_params : array_like of int
        Free parameters of each fit (linear and nonlinear), >= 0.
    n_points : array_like of int
        Points fitted, >= 1; broadcast against ``chi2``.

    Returns
    -------
    bic, aic : ndarray of float
        :math:`\\chi^2 + k \\ln n` (Schwarz 1978) and :math:`\\chi^2 + 2k`
        (Akaike 1974), shaped as the broadcast inputs.
    """
    c = np.asarray(chi2, dtype=float)
    k = np.asarray(n_params)
    n = np.asarray(n_points)
    if np.any(k < 0) or np.any(k != np.round(k)):
        raise ParameterError("n_params must be whole numbers >= 0")
    if np.any(n < 1) or np.any(n != np.round(n)):
        raise ParameterError("n_points must be whole numbers >= 1")
    k = k.astype(float)
    return c + k * np.log(n.astype(float)), c + 2.0 * k


def model_weights(criterion, *, axis=0, prior=None):
    """Normalised weights :math:`\\propto p\\,e^{-\\mathrm{IC}/2}` of models.

    Parameters
    ----------
    criterion : array_like of float, shape (n_models, ...)
        BIC or AIC of each model (along ``axis``); a non-finite value marks a
        failed fit, which gets weight 0.
    axis : int, optional
        Axis of the models (default 0).
    prior : array_like of float, optional
        Prior probability :math:`p` of each model, >= 0, broadcast against
        ``criterion`` (default equal priors).  Where every model that was
        fitted has prior 0, the priors are ignored for that entry.

    Returns
    -------
    weights : ndarray of float, shape of ``criterion``
        Summing to 1 along ``axis``; computed relative to the smallest
        criterion, so that differences of thousands do not underflow to 0/0.

    Raises
    ------
    AllMaskedError
        When every model along ``axis`` failed for some entry.

    References
    ----------
    Gibson 2014, MNRAS 445, 3401; Wakeford et al. 2016, ApJ 819, 10.
    """
    ic = np.asarray(criterion, dtype=float)
    if ic.ndim == 0:
        raise ParameterError("criterion must hold one value per model (at least 1-D)")
    ok = np.isfinite(ic)
    if not np.all(np.any(ok, axis=axis)):
        raise AllMaskedError("every model's information criterion is non-finite: no fit succeeded")
    if prior is not None:
        p = np.broadcast_to(np.asarray(prior, dtype=float), ic.shape)
        if not np.all(np.isfinite(p) & (p >= 0)):
            raise ParameterError("prior must hold finite probabilities >= 0")
        with np.errstate(divide="ignore"):
            posterior = np.where(p > 0, ic - 2.0 * np.log(np.where(p > 0, p, 1.0)), np.inf)
        usable = np.any(np.isfinite(posterior) & ok, axis=axis, keepdims=True)
        ic = np.where(usable, posterior, ic)
        ok = np.isfinite(ic)
    best = np.min(np.where(ok, ic, np.inf), axis=axis, keepdims=True)
    w = np.where(ok, np.exp(-0.5 * (np.where(ok, ic, best) - best)), 0.0)
    return w / np.sum(w, axis=axis, keepdims=True)


def marginalise(values, errors, weights, *, axis=0):
    """Weighted mean of a parameter over models, with the spread between them in the error.

    Models of zero weight never contribute, even when their value or error
    is not finite (a failed fit); a non-finite value or error in a model of
    non-zero weight is an error.

    Parameters
    ----------
    values, errors : array_like of float, shape (n_models, ...)
        The parameter and its one-sigma error from each model (along
        ``axis``).
    weights : array_like of float, shape (n_models, ...) or (n_models,)
        Model weights (:func:`model_weights`), >= 0 and summing to 1 along
        ``axis``; a 1-D array is shared by every entry.
    axis : int, optional
        Axis of the models (default 0).

    Returns
    -------
    Marginalised

    Notes
    -----
    :math:`\\bar x = \\sum W_q x_q` and
    :math:`\\sigma^2 = \\sum W_q \\sigma_q^2 + \\sum W_q (x_q - \\bar x)^2`:
    the variance of the mixture of the models' Gaussians with weights
    :math:`W_q` (law of total variance), as Wakeford et al. 2016 use it.

    References
    ----------
    Wakeford et al. 2016, ApJ 819, 10; Gibson 2014, MNRAS 445, 3401.
    """
    x = np.asarray(values, dtype=float)
    e = np.asarray(errors, dtype=float)
    if e.shape != x.shape:
        raise ParameterError(f"errors must have the shape of values {x.shape}; got {e.shape}")
    if x.ndim == 0:
        raise ParameterError("values must hold one value per model (at least 1-D)")
    w = np.asarray(weights, dtype=float)
    ax = axis % x.ndim
    if w.ndim == 1 and x.ndim > 1:
        if w.size != x.shape[ax]:
            raise ParameterError(f"weights must give one weight per model ({x.shape[ax]}); got {w.size}")
        shape = [1] * x.ndim
        shape[ax] = w.size
        w = w.reshape(shape)
    w = np.broadcast_to(w, x.shape) if w.shape != x.shape else w
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ParameterError("weights must be finite and >= 0")
    total = np.sum(w, axis=ax)
    if not np.allclose(total, 1.0, rtol=0, atol=1e-9):
        raise ParameterError("weights must sum to 1 over the models")
    used = w > 0
    if np.any(used & ~(np.isfinite(x) & np.isfinite(e))):
        raise ParameterError("a model with non-zero weight has a non-finite value or error")
    xs = np.where(used, x, 0.0)
    es = np.where(used, e, 0.0)
    mean = np.sum(w * xs, axis=ax)
    dev = np.where(used, xs - np.expand_dims(mean, ax), 0.0)
    within = np.sum(w * es * es, axis=ax)
    between = np.sum(w * dev * dev, axis=ax)
    return Marginalised(value=mean, error=np.sqrt(within + between), within=np.sqrt(within),
                        between=np.sqrt(between))
