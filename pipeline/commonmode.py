"""Common modes: the white light curve's systematics divided out of the channels.

Systematics that act alike at every wavelength (ramps, visit-long trends,
pointing jitter, correlated read noise along the dispersion) appear in the
white light curve with the most signal.  Two ways of dividing them out of a
spectroscopic channel before its own fit are offered as grid members
(:mod:`lightledger.pipeline.grid`):

``sys``
    the white light's fitted systematics model (star times systematics, the
    planet's own flux left out), normalised to a mean of 1;
``res``
    the white light curve over its fitted event model, normalised to a mean
    of 1: the systematics *as measured*, model and residuals together
    ("divide-white"; Berta et al. 2012; Kreidberg et al. 2014).  The channel
    keeps its own eclipse or transit; what is left of the white light's
    depth error is inherited (:mod:`lightledger.pipeline.inherited`).

A channel divided by the measured white light shares photons with it (the
white band holds the channel's own flux): the ratio's variance is not the
channel's variance over the divisor squared, and using that would lower the
channel's chi-square by about the channel's share of the white light times
the number of exposures, a spurious gain in any information criterion.
:func:`divide_common_mode` propagates the variance with the covariance.

The white light's own choice of systematics model is uncertain too: its
depth is marginalised over its models (Gibson 2014; Wakeford et al. 2016),
and :func:`common_mode_choice` does the same for a channel divided by a
common mode, over the common modes of those models.

Masks are not handled here (NaN propagates).  Inputs are not modified.
"""

import numpy as np

from .errors import ParameterError

__all__ = ["COMMON_MODES", "common_modes", "divide_common_mode", "common_mode_choice"]

#: Common-mode kinds by token suffix.
COMMON_MODES = ("sys", "res")


def _unit_mean(g):
    g = np.asarray(g, dtype=float)
    finite = np.isfinite(g)
    if not np.any(finite):
        return g
    return g / np.mean(g[finite])


def common_modes(white_result, white_flux):
    """The white light's common modes from its fit.

    Parameters
    ----------
    white_result : DetrendResult
        The white light curve's fit (:func:`~lightledger.pipeline.eventfit.fit_event`):
        ``model`` (full model, flux units), ``systematics`` and, for an
        eclipse with the planet's own flux, ``star`` (the star alone times
        the systematics).
    white_flux : array_like of float, shape (n_exposures,)
        The white light curve, flux units.

    Returns
    -------
    dict
        ``{"sys": g_sys, "res": g_res}``, each of shape (n_exposures,) with
        mean 1 over its finite values: ``g_sys = S`` and ``g_res = f_w
        S / m_w`` (``S`` the star times the systematics, ``m_w`` the full
        model, ``f_w`` the white flux; ``m_w / S`` is the event model).
    """
    star = white_result.star if white_result.star is not None else white_result.systematics
    star = np.asarray(star, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        measured = np.asarray(white_flux, dtype=float) * star / np.asarray(white_result.model, float)
    return {"sys": _unit_mean(star), "res": _unit_mean(measured)}


def divide_common_mode(flux, variance, g, *, kind, white_flux=None, white_variance=None,
                       share=1.0):
    r"""A channel divided by a common mode, with the ratio's variance.

    Parameters
    ----------
    flux, variance : array_like of float, shape (n_exposures,)
        The channel's flux and its variance (flux units).
    g : array_like of float, shape (n_exposures,)
        The common mode (:func:`common_modes`).
    kind : {"sys", "res"}
        A fitted model (``sys``: no noise of its own to first order) or the
        measured white light (``res``).
    white_flux, white_variance : array_like of float, shape (n_exposures,), optional
        The white light curve and its variance; required for ``res``.
    share : float, optional
        Fraction of the channel's flux inside the white band (default 1: the
        white light is the sum over a band that holds the channel).

    Returns
    -------
    (ndarray, ndarray)
        ``y = flux / g`` and its variance.

    Notes
    -----
    For ``sys``, :math:`\mathrm{Var}(y) = \sigma^2/g^2` (the model's own
    errors are inherited separately).  For ``res``, :math:`g \propto f_w`
    up to a smooth model, and with the channel's flux :math:`f` inside the
    white light, :math:`\mathrm{Cov}(f, f_w) = s\,\sigma^2` (``share``
    :math:`s`), so to first order

    .. math:: \frac{\mathrm{Var}(y)}{y^2} = \frac{\sigma^2}{f^2}
              + \frac{\sigma_w^2}{f_w^2} - \frac{2 s \sigma^2}{f f_w}

    (propagation of errors of a ratio of correlated quantities, common
    practice).  It is >= 0 whenever :math:`\sigma_w^2 \ge s\,\sigma^2`
    (the white light carries at least the channel's shared noise); it is
    held above :math:`10^{-6}\sigma^2/f^2`.
    """
    if kind not in COMMON_MODES:
        raise ParameterError(f"kind must be one of {', '.join(COMMON_MODES)}; got {kind!r}")
    f = np.asarray(flux, dtype=float)
    v = np.asarray(variance, dtype=float)
    g = np.asarray(g, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        y = f / g
        if kind == "sys":
            return y, v / (g * g)
        if white_flux is None or white_variance is None:
            raise ParameterError("a 'res' common mode needs white_flux and white_variance")
        fw = np.asarray(white_flux, dtype=float)
        vw = np.asarray(white_variance, dtype=float)
        s = float(share)
        if not 0.0 <= s <= 1.0:
            raise ParameterError(f"share must be between 0 and 1; got {share!r}")
        rel = v / (f * f) + vw / (fw * fw) - 2.0 * s * v / (f * fw)
        # a floor keeps a degenerate case (a channel that is the whole white band) finite
        return y, y * y * np.maximum(rel, 1e-6 * v / (f * f))


def common_mode_choice(flux, variance, alternatives, fit_depth, *, kind, white_flux=None,
                       white_variance=None, share=1.0):
    r"""A channel's depth over the white light's models' common modes: mean and spread.

    The common mode divided out of a channel comes from one fit of the white
    light curve, but the white light weighs several systematics models
    (their information-criterion weights).  The channel is divided by each
    model's common mode in turn and refitted (its own model held), and its
    depths are marginalised with the white light's weights (Wakeford et al.
    2016): :math:`\bar d = \sum_k w_k d_k` and the between-model variance
    :math:`\sum_k w_k (d_k - \bar d)^2`, which belongs in the channel's error
    as the white light's model choice is in the white depth's.

    Parameters
    ----------
    flux, variance : array_like of float, shape (n_exposures,)
        The channel, flux units.
    alternatives : sequence of (float, ndarray)
        The white light's weight of each model and that model's common mode
        of ``kind`` (:func:`common_modes`); weights are normalised here.
    fit_depth : callable
        ``fit_depth(flux, variance) -> depth``: the channel's fit of a
        divided light curve.
    kind, white_flux, white_variance, share
        As for :func:`divide_common_mode`.

    Returns
    -------
    (float, float)
        The weighted mean depth and the between-model variance (NaN and 0
        when no refit gives a finite depth).
    """
    weights, depths = [], []
    for w, g in alternatives:
        y, v = divide_common_mode(flux, variance, g, kind=kind, white_flux=white_flux,
                                  white_variance=white_variance, share=share)
        weights.append(float(w))
        depths.append(float(fit_depth(y, v)))
    d = np.asarray(depths, float)
    w = np.asarray(weights, float)
    ok = np.isfinite(d) & (w > 0)
    if not np.any(ok):
        return float("nan"), 0.0
    w = w[ok] / np.sum(w[ok])
    mean = float(np.sum(w * d[ok]))
    return mean, float(np.sum(w * (d[ok] - mean) ** 2))
