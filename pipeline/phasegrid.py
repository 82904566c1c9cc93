"""Phase-curve parameters marginalised over a grid of systematics models.

A phase curve (the planet's flux over the whole orbit, with its transits and
eclipses; :func:`lightledger.pipeline.programme.fit_programme`) is fitted once
per systematics model of a grid.  The white band ranks the models by BIC or
AIC and weights them by :math:`e^{-\\mathrm{IC}/2}` normalised; each channel
weighs them by :math:`W_{\\rm white}\\, e^{-\\mathrm{IC}/2}` normalised, the
white band's weights as the models' prior (as the single-visit grid does,
:func:`lightledger.pipeline.gridrank.channel_prior`).  Each light curve then
marginalises every planet quantity (radius ratio, transit and eclipse depths,
night side, extremes, amplitude, offset of the maximum) over them: the
weighted mean, with an error that adds the spread between models to their
own errors (Gibson 2014; Wakeford et al. 2016;
:func:`lightledger.pipeline.gridrank.rank_fits`,
:func:`lightledger.pipeline.gridrank.marginalise_fits`).

The same function serves one visit and a programme of visits fitted jointly:
give it one fit per model, all of the same visits and channels.

Pure functions; inputs are not modified.  Fluxes are relative to the star's.
"""

from dataclasses import dataclass

import numpy as np

from .errors import AllMaskedError, ParameterError
from .gridrank import marginalise_fits, rank_fits

__all__ = ["PLANET_QUANTITIES", "planet_quantity", "planet_interval", "PhaseGrid",
           "fit_phase_grid", "marginal_interval"]

#: Planet quantities marginalised over the models, as in a phase-curve product's PLANET table.
PLANET_QUANTITIES = ("rp_rs", "transit_depth", "eclipse_depth", "night_flux", "max_flux",
                     "min_flux", "amplitude", "offset_deg")


def planet_quantity(fit, name):
    """(value, error) of one of :data:`PLANET_QUANTITIES` from a JointFit (NaN if not measured).

    The radius ratio and transit depth are NaN when the radius was not fitted
    (no transit in the data); the planet's flux quantities are NaN when its
    flux was not fitted.
    """
    nan = (float("nan"), float("nan"))
    if name in ("rp_rs", "transit_depth"):
        if not fit.fitted_radius:
            return nan
        return ((fit.rp_rs, fit.rp_rs_error) if name == "rp_rs"
                else (fit.transit_depth, fit.transit_depth_error))
    s = fit.summary
    if s is None:
        return nan
    return {"eclipse_depth": (s.day, s.day_error), "night_flux": (s.night, s.night_error),
            "max_flux": (s.maximum, s.maximum_error), "min_flux": (s.minimum, s.minimum_error),
            "amplitude": (s.amplitude, s.amplitude_error),
            "offset_deg": (s.offset_deg, s.offset_error_deg)}[name]


def planet_interval(fit, name):
    """(error_lo, error_hi) of ``"amplitude"`` or ``"offset_deg"`` from a JointFit.

    The distances from the posterior median to the ends of the central 68 %
    interval (:class:`~lightledger.pipeline.phasecurve.PhaseCurveSummary`);
    NaN when the planet's flux was not fitted.
    """
    s = fit.summary
    if s is None:
        return float("nan"), float("nan")
    return {"amplitude": (s.amplitude_error_lo, s.amplitude_error_hi),
            "offset_deg": (s.offset_error_lo_deg, s.offset_error_hi_deg)}[name]


@dataclass(frozen=True)
class PhaseGrid:
    """Phase-curve fits of several systematics models, ranked and marginalised.

    Light curves are indexed ``0`` for the white band and ``1 + j`` for
    channel ``j``.

    Attributes
    ----------
    names : tuple of str
        The models.
    fits : tuple
        One ProgrammeFit per model (None where it failed).
    chi2, bic, aic, weight : ndarray of float, shape (n_models, 1 + n_channels)
        ``weight``: the white band's from its criterion alone, a channel's
        with the white band's weights as the models' prior.
    n_params, n_points : ndarray of int, shape (n_models, 1 + n_channels)
    values, errors : dict of str to ndarray of float, shape (n_models, 1 + n_channels)
        Each quantity of :data:`PLANET_QUANTITIES` and its error per fit.
    value, error, within, between : dict of str to ndarray of float, shape (1 + n_channels,)
        Marginalised value, its error, and the error's two parts (the models'
        own errors, the spread between models); NaN where no model with
        weight measured the quantity.
    best : ndarray of int, shape (1 + n_channels,)
        Top-weighted model of each light curve.
    criterion : str
    failures : tuple of str
    """

    names: tuple
    fits: tuple
    chi2: np.ndarray
    bic: np.ndarray
    aic: np.ndarray
    weight: np.ndarray
    n_params: np.ndarray
    n_points: np.ndarray
    values: dict
    errors: dict
    value: dict
    error: dict
    within: dict
    between: dict
    best: np.ndarray
    criterion: str
    failures: tuple

    def fit_of(self, m, c):
        """JointFit of model ``m`` on light curve ``c`` (0 = white band)."""
        fit = self.fits[m]
        return fit.white if c == 0 else fit.channels[c - 1]

    def top_fit(self):
        """A ProgrammeFit made of each light curve's top-weighted model's fit."""
        from .programme import ProgrammeFit
        n_ch = self.weight.shape[1] - 1
        return ProgrammeFit(white=self.fit_of(self.best[0], 0),
                            channels=tuple(self.fit_of(self.best[1 + j], 1 + j)
                                           for j in range(n_ch)))


def _marginalise_measured(values, errors, weights):
    """Marginalise each light curve over the models that measured the quantity.

    A model of non-zero weight without the quantity (NaN: e.g. an amplitude
    its fit could not define) drops out and the rest are renormalised; a
    light curve whose models all lack it gets NaN.
    """
    ok = np.isfinite(values) & np.isfinite(errors) & (weights > 0)
    w = np.where(ok, weights, 0.0)
    total = w.sum(axis=0)
    has = total > 0
    out = [np.full(values.shape[1], np.nan) for _ in range(4)]
    if np.any(has):
        wn = w[:, has] / total[has]
        m = marginalise_fits(np.where(ok, values, 0.0)[:, has], np.where(ok, errors, 0.0)[:, has],
                             wn)
        for arr, part in zip(out, (m.value, m.error, m.within, m.between)):
            arr[has] = part
    return out


def fit_phase_grid(fits, names, *, criterion="bic", failures=()):
    """Rank phase-curve fits of several models per light curve and marginalise the planet.

    Parameters
    ----------
    fits : sequence of ProgrammeFit or None
        One fit per model (:func:`lightledger.pipeline.programme.fit_programme`
        with that model for every visit), all of the same visits and
        channels; None for a model whose fit failed (weight 0).
    names : sequence of str
        The models' names, in the order of ``fits``.
    criterion : {"bic", "aic"}
    failures : sequence of str, optional
        Lines describing failed fits, kept in the result.

    Returns
    -------
    PhaseGrid

    Raises
    ------
    AllMaskedError
        When every model failed.

    Notes
    -----
    BIC = chi2 + k ln N and AIC = chi2 + 2k per light curve, k and N from
    each joint fit (every visit's systematics columns and shape parameters,
    the planet's coefficients, the radius when fitted; the fitted exposures
    of every visit); the white band's weights :math:`W_{m} \\propto
    e^{-\\mathrm{IC}_m/2}` (Gibson 2014), a channel's :math:`\\propto W_m
    e^{-\\mathrm{IC}_m/2}` with its own criterion.  A channel holds a fraction
    of the white band's signal: alone it tells a systematic the white band
    shows (a ramp) from noise less well, and by its own criterion a model
    without it would win on its fewer parameters, every channel alike.
    Every model here has its own white fit and none divides a common mode
    out, so the prior of :func:`~lightledger.pipeline.gridrank.channel_prior`
    is the white band's weights themselves.  The marginalised error is
    :math:`\\sqrt{\\sum W \\sigma^2 + \\sum W (x - \\bar x)^2}` (Wakeford et
    al. 2016).  Cost: negligible beside the fits.
    """
    fits, names = tuple(fits), tuple(str(n) for n in names)
    if len(fits) != len(names) or not fits:
        raise ParameterError(f"give one name per fit and at least one fit; got {len(fits)} fits "
                             f"and {len(names)} names")
    good = [f for f in fits if f is not None]
    if not good:
        raise AllMaskedError("no systematics model could be fitted to the phase curve: "
                             + "; ".join(list(failures)[:3]))
    n_ch = {len(f.channels) for f in good}
    if len(n_ch) != 1:
        raise ParameterError("every model's fit must have the same channels")
    n_curves = 1 + n_ch.pop()
    shape = (len(fits), n_curves)
    chi2 = np.full(shape, np.nan)
    n_params = np.zeros(shape, int)
    n_points = np.zeros(shape, int)
    values = {q: np.full(shape, np.nan) for q in PLANET_QUANTITIES}
    errors = {q: np.full(shape, np.nan) for q in PLANET_QUANTITIES}
    for m, fit in enumerate(fits):
        if fit is None:
            continue
        for c, jf in enumerate((fit.white,) + tuple(fit.channels)):
            if not np.isfinite(jf.chi2) or jf.n_points <= jf.n_params:
                continue
            chi2[m, c], n_params[m, c], n_points[m, c] = jf.chi2, jf.n_params, jf.n_points
            for q in PLANET_QUANTITIES:
                values[q][m, c], errors[q][m, c] = planet_quantity(jf, q)
    if not np.all(np.any(np.isfinite(chi2), axis=0)):
        raise AllMaskedError("no systematics model could be fitted to every light curve of the "
                             "phase curve")
    bic, aic, weight = rank_fits(chi2, n_params, n_points, criterion=criterion)
    if n_curves > 1:
        weight[:, 1:] = rank_fits(chi2[:, 1:], n_params[:, 1:], n_points[:, 1:],
                                  criterion=criterion, prior=weight[:, 0])[2]
    value, error, within, between = {}, {}, {}, {}
    for q in PLANET_QUANTITIES:
        x = values[q]
        if q == "offset_deg":
            # an angle: take it on the branch nearest the top model's, back to [-180, 180)
            ref = x[np.argmax(weight, axis=0), np.arange(n_curves)]
            x = ref + (x - ref + 180.0) % 360.0 - 180.0
        value[q], error[q], within[q], between[q] = _marginalise_measured(x, errors[q], weight)
        if q == "offset_deg":
            value[q] = (value[q] + 180.0) % 360.0 - 180.0
    return PhaseGrid(names=names, fits=fits, chi2=chi2, bic=bic, aic=aic, weight=weight,
                     n_params=n_params, n_points=n_points, values=values, errors=errors,
                     value=value, error=error, within=within, between=between,
                     best=np.argmax(weight, axis=0), criterion=criterion,
                     failures=tuple(failures))


def marginal_interval(grid, name):
    """Lower and upper errors of a marginalised amplitude or offset, per light curve.

    Parameters
    ----------
    grid : PhaseGrid
    name : {"amplitude", "offset_deg"}

    Returns
    -------
    (lo, hi) : ndarray of float, shape (1 + n_channels,)
        NaN where no model of non-zero weight measured the quantity.

    Notes
    -----
    Each side as the marginalised error is formed (Wakeford et al. 2016),
    with that side's own error: :math:`\\sigma_\\pm = \\sqrt{\\sum W
    (\\sigma_{\\pm,m}^2 + (x_m - \\bar x)^2)}`, over the models that measured
    the quantity (weights renormalised), the offsets taken on the branch
    nearest the top model's.  The spread between models widens both sides
    alike.
    """
    if name not in ("amplitude", "offset_deg"):
        raise ParameterError(f"marginal_interval: name must be 'amplitude' or 'offset_deg'; "
                             f"got {name!r}")
    n_models, n_curves = grid.weight.shape
    lo, hi = np.full(n_curves, np.nan), np.full(n_curves, np.nan)
    for c in range(n_curves):
        x = np.asarray(grid.values[name][:, c], float)
        if name == "offset_deg":
            ref = x[int(np.argmax(grid.weight[:, c]))]
            x = ref + (x - ref + 180.0) % 360.0 - 180.0
        sides = np.full((n_models, 2), np.nan)
        for m in range(n_models):
            if grid.fits[m] is not None and np.isfinite(grid.chi2[m, c]):
                sides[m] = planet_interval(grid.fit_of(m, c), name)
        w = np.asarray(grid.weight[:, c], float)
        ok = np.isfinite(x) & np.all(np.isfinite(sides), axis=1) & (w > 0)
        if not ok.any():
            continue
        W = w[ok] / w[ok].sum()
        spread = (x[ok] - np.sum(W * x[ok])) ** 2
        lo[c] = float(np.sqrt(np.sum(W * (sides[ok, 0] ** 2 + spread))))
        hi[c] = float(np.sqrt(np.sum(W * (sides[ok, 1] ** 2 + spread))))
    return lo, hi
