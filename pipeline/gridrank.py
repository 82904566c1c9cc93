"""Ranking the models of a grid and marginalising over them: the generic pieces.

:func:`rank_fits` and :func:`marginalise_fits` serve any fit that tries
several systematics models (the single-visit grid of
:mod:`lightledger.pipeline.grid`, a joint fit of several visits): give them
the chi-square, parameter count and point count of each fit and any
parameter with its error (Gibson 2014; Wakeford et al. 2016;
:mod:`lightledger.pipeline.selection`).  :func:`channel_prior` gives a
spectroscopic channel the white light curve's weights as the models' prior.

Inputs are not modified.
"""

import numpy as np

from .errors import ParameterError
from .selection import CRITERIA, information_criteria, marginalise, model_weights

__all__ = ["rank_fits", "marginalise_fits", "channel_prior"]


def rank_fits(chi2, n_params, n_points, *, criterion="bic", prior=None):
    """BIC, AIC and weights of fits of several models to the same points.

    Parameters
    ----------
    chi2, n_params, n_points : array_like, shape (n_models, ...)
        Per fit; a failed fit has a non-finite chi-square (weight 0).
    criterion : {"bic", "aic"}
    prior : array_like of float, optional
        Prior probability of each model (shape (n_models,) or broadcast
        against ``chi2``; e.g. :func:`channel_prior`), default equal.

    Returns
    -------
    bic, aic, weights : ndarray of float, shape (n_models, ...)
    """
    if criterion not in CRITERIA:
        raise ParameterError(f"criterion must be one of {', '.join(CRITERIA)}; got {criterion!r}")
    c = np.asarray(chi2, float)
    k = np.nan_to_num(np.asarray(n_params, float), nan=0.0)
    n = np.nan_to_num(np.asarray(n_points, float), nan=1.0)
    bic, aic = information_criteria(c, k.astype(int), np.maximum(n, 1).astype(int))
    ic = bic if criterion == "bic" else aic
    if prior is not None:
        prior = np.asarray(prior, float).reshape((-1,) + (1,) * (ic.ndim - 1))
    return bic, aic, model_weights(ic, axis=0, prior=prior)


def channel_prior(specs, white_weight, white_owner, common_mode_model):
    """The models' prior for a channel: the white light's weights.

    A channel is fitted at the white light's shape parameters and event; a
    channel alone, with a fraction of the white light's signal, cannot tell
    a systematic (a ramp) the white light shows, and by its own criterion
    alone a model without it wins on its fewer parameters, biasing every
    channel alike.  Each model's prior is the white light's weight of the
    white model it shares (``white_owner``); a common-mode member's, that of
    the white model whose systematics it divides out.

    Parameters
    ----------
    specs : sequence of ModelSpec
    white_weight : array_like of float, shape (n_models,)
        The white light's weights (0 for models sharing another's white fit).
    white_owner : array_like of int, shape (n_models,)
    common_mode_model : int
        The top white model (whose common modes are divided out).

    Returns
    -------
    ndarray of float, shape (n_models,)
    """
    w = np.asarray(white_weight, float)
    owner = np.asarray(white_owner, int)
    cm = np.array([bool(s.common_mode) for s in specs])
    return np.where(cm, w[int(common_mode_model)], w[owner])


def marginalise_fits(values, errors, weights):
    """Marginalise a parameter over models (:func:`lightledger.pipeline.selection.marginalise`)."""
    return marginalise(values, errors, weights, axis=0)
