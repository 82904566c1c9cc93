"""Limb darkening per channel: from a table, or fitted with a prior.

A channel's transit shape depends on its limb darkening.  Two ways besides
one pair for every channel:

- :func:`table_limb_darkening`: coefficients given per wavelength (e.g. from
  stellar models) interpolated linearly at each channel's centre;
- :func:`fit_limb_darkening`: the quadratic coefficients of each channel
  fitted to its light curve with the systematics model and event of the white
  light held fixed, with a Gaussian prior centred on the white light's pair
  (the channel's chi-square plus :math:`\\sum_k ((u_k - \\bar u_k)/\\sigma)^2`
  minimised; common practice: the prior keeps a poorly constrained channel
  near the band's value).

Inputs are not modified.
"""

import numpy as np
from scipy.optimize import minimize

from .errors import ParameterError
from .whitelight import event_template, fit_at_shapes

__all__ = ["table_limb_darkening", "fit_limb_darkening"]


def table_limb_darkening(wave_mid, table_wave, table_u1, table_u2):
    """Quadratic coefficients at channel centres from a per-wavelength table.

    Parameters
    ----------
    wave_mid : array_like of float, shape (n_channels,)
        Channel centres, um.
    table_wave : array_like of float, shape (n_table,)
        Increasing wavelengths, um.
    table_u1, table_u2 : array_like of float, shape (n_table,)

    Returns
    -------
    u1, u2 : ndarray of float, shape (n_channels,)
        Linear interpolation, held at the end values outside the table.
    """
    w = np.asarray(table_wave, float)
    a, b = np.asarray(table_u1, float), np.asarray(table_u2, float)
    if w.ndim != 1 or w.size < 1 or a.shape != w.shape or b.shape != w.shape:
        raise ParameterError("the limb-darkening table needs equal-length wavelength, u1 and u2 lists")
    if np.any(np.diff(w) <= 0):
        raise ParameterError("the limb-darkening table's wavelengths must increase")
    x = np.asarray(wave_mid, float)
    return np.interp(x, w, a), np.interp(x, w, b)


def fit_limb_darkening(inputs, flux, variance, model, shapes, event, *, prior, sigma, mask=None,
                       **event_options):
    """Fit one channel's quadratic limb darkening with a Gaussian prior.

    Parameters
    ----------
    inputs : SystematicsInputs
    flux, variance : array_like of float, shape (n_exposures,)
    model : SystematicsModel
        The systematics model, evaluated at ``shapes`` (held fixed).
    shapes : dict
        Shape parameters (from the white light).
    event : dict
        The event (the white light's fitted geometry); its ``u1``, ``u2`` are
        replaced.
    prior : (float, float)
        Centre of the prior on (u1, u2), e.g. the white light's pair.
    sigma : float
        Standard deviation of the prior on each coefficient, > 0.
    mask : array_like of bool, shape (n_exposures,), optional
        True = not fitted.
    **event_options
        Options of :func:`~lightledger.pipeline.eventfit.fit_event`.

    Returns
    -------
    (float, float)
        The fitted (u1, u2); the prior's centre for an eclipse, whose shape
        does not depend on limb darkening.
    """
    if not (np.isfinite(sigma) and sigma > 0):
        raise ParameterError(f"the limb-darkening prior's sigma must be > 0; got {sigma!r}")
    u0 = np.asarray(prior, float)
    if event["kind"] != "transit":
        return float(u0[0]), float(u0[1])
    def objective(u):
        tmpl = event_template(inputs.time, event, u1=float(u[0]), u2=float(u[1]))
        try:
            res, _ = fit_at_shapes(inputs, flux, variance, tmpl, model, shapes, mask=mask,
                                   **event_options)
        except ParameterError:
            return np.inf
        return res.chi2 + float(np.sum(((u - u0) / sigma) ** 2))

    opt = minimize(objective, u0, method="Nelder-Mead",
                   options={"xatol": 1e-4, "fatol": 1e-3, "maxiter": 200})
    u = opt.x if np.isfinite(opt.fun) else u0
    return float(u[0]), float(u[1])
