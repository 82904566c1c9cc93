"""Astrophysical event shapes for the single-visit fit: templates and phase sinusoids.

A *template* is an event shape of unit depth, 0 out of the event: the
fraction of the star's flux a transit blocks, scaled to 1 at its deepest
point, or the fraction of the planet hidden by the star during an eclipse.
:func:`lightledger.pipeline.eventfit.fit_event` multiplies it by a fitted
depth.  The phase sinusoids describe the planet's own flux as a function of
orbital phase (Cowan & Agol 2008).

Times are days; shapes are dimensionless.  Inputs are not modified.
"""

import numpy as np

from .argchecks import vector as _vector, order as _order
from .errors import ParameterError

__all__ = ["transit_template", "eclipse_template", "phase_curve_basis"]


def transit_template(model_flux):
    """Unit-depth transit shape from a normalised transit model.

    Parameters
    ----------
    model_flux : array_like of float, shape (n_exposures,)
        Model relative flux, 1 out of transit (e.g. from a Mandel & Agol 2002
        model).

    Returns
    -------
    s : ndarray of float, shape (n_exposures,)
        ``(1 - model) / max(1 - model)``: 0 out of transit, 1 at the deepest
        point.
    """
    m = _vector(model_flux, "model_flux")
    drop = 1.0 - m
    peak = np.nanmax(drop) if drop.size else 0.0
    if not np.isfinite(peak) or peak <= 0:
        raise ParameterError("model_flux must dip below 1 somewhere (a transit); it does not")
    return drop / peak


def eclipse_template(model_flux):
    """Unit-depth eclipse shape from an eclipse model.

    Parameters
    ----------
    model_flux : array_like of float, shape (n_exposures,)
        Model flux of star plus planet, highest out of eclipse.

    Returns
    -------
    s : ndarray of float, shape (n_exposures,)
        ``(max - model) / (max - min)``: one minus the planet's visibility, 0
        out of eclipse and 1 in full eclipse.
    """
    m = _vector(model_flux, "model_flux")
    hi, lo = np.nanmax(m), np.nanmin(m)
    if not (np.isfinite(hi) and np.isfinite(lo) and hi > lo):
        raise ParameterError("model_flux must vary (an eclipse); it is constant")
    return (hi - m) / (hi - lo)


def phase_curve_basis(time, t0, period, *, harmonics=1):
    """Sinusoids of the orbital phase, for a phase curve.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        BJD_TDB, days.
    t0 : float
        Reference mid-transit time, days.
    period : float
        Orbital period, days, > 0.
    harmonics : int, optional
        Number of harmonics (default 1).

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, 2 * harmonics)
        ``cos(2 pi h phi), sin(2 pi h phi)`` for h = 1..harmonics with
        ``phi = (time - t0) / period``.
    """
    t = _vector(time, "time")
    if not (np.isfinite(period) and period > 0):
        raise ParameterError(f"period must be a finite number of days > 0; got {period!r}")
    h = _order(harmonics, "harmonics")
    phi = (t - float(t0)) / float(period)
    cols = []
    for k in range(1, h + 1):
        cols += [np.cos(2 * np.pi * k * phi), np.sin(2 * np.pi * k * phi)]
    return np.stack(cols, axis=1) if cols else np.zeros((t.size, 0))
