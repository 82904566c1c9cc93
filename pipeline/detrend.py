"""Systematics detrending of light curves jointly with an event template.

The single-visit fit, built from pieces of one idea each:

* :mod:`lightledger.pipeline.systematics`: the systematics model, a tuple of
  components (visit polynomial, orbit-phase polynomial, per-orbit ramp, scan
  offset, ...) that builds a design matrix and names its nonlinear shape
  parameters;
* :mod:`lightledger.pipeline.eventshapes`: event templates (transit,
  eclipse) and phase sinusoids;
* :mod:`lightledger.pipeline.eventfit`: :func:`fit_event`, the weighted fit
  of systematics times the event at fixed shape parameters, and
  :class:`DetrendResult`;
* :mod:`lightledger.pipeline.leastsq`: the SVD linear solve and the bilinear
  Gauss-Newton kernel;
* :mod:`lightledger.pipeline.shapesearch`: the choice of shape parameters by
  chi-square;
* :mod:`lightledger.pipeline.diagnostics`: binned rms and beta.

This module joins them: :func:`fit_light_curve` fits any
:class:`~lightledger.pipeline.systematics.SystematicsModel` to one light
curve, :func:`detrend_light_curve` does so for the model described by
keyword options, and :func:`fit_channels` fits every channel, optionally
after dividing by the white light's systematics.  The names of the earlier
single module are re-exported here.

Masks: True where an exposure is bad.  Inputs are not modified.
"""

from dataclasses import dataclass
from functools import partial

import numpy as np

from .diagnostics import BinnedRms, binned_rms
from .argchecks import vector as _vector
from .components import trap_limits
from .errors import ParameterError
from .eventfit import DetrendResult, fit_event, with_shapes
from .eventshapes import eclipse_template, phase_curve_basis, transit_template
from .shapesearch import ramp_limits, search_shapes
from .systematics import (DEFAULT_TAU_GRID, OrbitRamp, SystematicsInputs, orbit_phase_basis,
                          polynomial_basis, ramp_basis, scan_direction_basis, standard_model)

__all__ = ["DetrendResult", "ChannelFits", "BinnedRms", "transit_template",
           "eclipse_template", "polynomial_basis", "orbit_phase_basis", "ramp_basis",
           "scan_direction_basis", "phase_curve_basis", "fit_event", "fit_light_curve",
           "tied_phase_curve", "fit_at_fitted_radius", "detrend_light_curve", "fit_channels",
           "binned_rms",
           "DEFAULT_TAU_GRID"]


def fit_light_curve(inputs, flux, variance, template, model, *, mask=None, **event_options):
    """Fit a systematics model times an event to one light curve.

    ``mask`` is True where an exposure is bad (see :func:`fit_event` for the
    mask contract).  Inputs are not modified.

    Parameters
    ----------
    inputs : SystematicsInputs
        Times and covariates of the exposures.
    flux, variance, template : array_like of float, shape (n_exposures,)
        See :func:`fit_event`.
    model : SystematicsModel
        The systematics components; the constant is added by the fit.
    mask : array_like of bool, shape (n_exposures,), optional
    **event_options
        Keyword options of :func:`fit_event` (``mode``,
        ``out_of_event_threshold``, ``planet_basis``, ``planet_at_event``,
        ``planet_names``, ``max_iter``).

    Returns
    -------
    DetrendResult
        Columns named by the components; each shape parameter counts as one
        free parameter and is listed in ``shapes``; ``tau`` is the time scale
        of the first :class:`~lightledger.pipeline.systematics.OrbitRamp`.

    Notes
    -----
    The shape parameters are chosen by
    :func:`~lightledger.pipeline.shapesearch.search_shapes`.  When any was
    chosen from the data (a grid of more than one value, or a refinement),
    the fit at the chosen values is repeated with the columns' derivatives
    (for a ramp, with respect to :math:`\\ln\\tau`,
    :math:`(t/\\tau) e^{-t/\\tau}`), so that the covariance and the depth
    error are marginalised over them (``basis_derivatives`` of
    :func:`fit_event`; first order).
    """
    def evaluate(values, derivatives=False):
        d = model.design(inputs, values)
        return fit_event(flux, variance, template, d.columns, mask=mask, basis_names=d.names,
                         basis_derivatives=d.derivatives if derivatives else None,
                         **event_options)

    limits = ramp_limits(inputs, model, mask, (OrbitRamp,))
    params, own = trap_limits(model, inputs, mask)     # the charge-trapping ramp's time scales
    limits.update(own)
    search = search_shapes(evaluate, params, limits=limits)
    result = search.result
    if not params:
        return result
    if search.chosen_from_data:
        result = evaluate(search.values, derivatives=True)
    ramps = [c for c in model.components if isinstance(c, OrbitRamp)]
    tau = search.values[f"{ramps[0].label}.tau"] if ramps else float("nan")
    return with_shapes(result, search.values, tau=tau, at_edge=search.at_edge)


def fit_at_fitted_radius(fit, template_of, flux, variance, template, *, mask=None,
                         max_iter=8, tol=1e-10):
    """Fit a transit whose shape follows the fitted radius ratio, not the a priori one.

    The template of a limb-darkened transit depends on the radius ratio
    (ingress, egress and the limb's curvature), so a template made from the
    a priori radius and scaled by the fitted depth is not the model of a
    planet of the fitted size.  Here the fit is repeated with the template
    made again at ``rp = sqrt(depth)`` until it stops changing: at the fixed
    point ``depth * s(sqrt(depth)) = 1 - F(sqrt(depth))``, the limb-darkened
    transit itself (Mandel & Agol 2002) with the fitted radius.

    Parameters
    ----------
    fit : callable
        ``fit(flux, variance, template, *, mask) -> DetrendResult`` (e.g. a
        partial of :func:`fit_light_curve`).
    template_of : callable
        ``template_of(rp_rs) -> ndarray``: the unit-depth template
        ``(1 - F(rp)) / rp**2`` of a transit of radius ratio ``rp_rs``.
    flux, variance, template : array_like of float, shape (n_exposures,)
        As in :func:`fit_event`; ``template`` is the a priori one (the start).
    mask : array_like of bool, shape (n_exposures,), optional
    max_iter : int, optional
        Refits at most (the map is a strong contraction: two or three suffice).
    tol : float, optional
        Largest change of the template that ends the iteration.

    Returns
    -------
    DetrendResult
        The fit at the last template; ``depth`` is the (rp/rs)^2 of the
        limb-darkened model.

    Notes
    -----
    The depth's error is that of the last fit, whose template is held fixed:
    the change of the transit's shape with the radius is second order in the
    error (it moves the depth by the small difference between the template's
    shapes at rp and rp + sigma).
    """
    res = fit(flux, variance, template, mask=mask)
    for _ in range(int(max_iter)):
        if not (np.isfinite(res.depth) and res.depth > 0):
            break
        new = np.asarray(template_of(float(np.sqrt(res.depth))), dtype=float)
        if np.nanmax(np.abs(new - template)) < tol:
            break
        template = new
        res = fit(flux, variance, template, mask=mask)
    return res


def tied_phase_curve(time, t0, period):
    """Planet columns of a first-harmonic phase curve hidden by a circular-orbit eclipse.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        BJD_TDB, days.
    t0, period : float
        Mid-transit time and period, days; mid-eclipse is ``t0 + period/2``.

    Returns
    -------
    dict
        ``planet_basis`` (constant, cos, sin of the orbital phase),
        ``planet_at_event`` and ``planet_names`` for :func:`fit_event`.
    """
    t = _vector(time, "time")
    pc = phase_curve_basis(t, t0, period)
    mid = phase_curve_basis(np.array([t0 + 0.5 * period]), t0, period)[0]
    return dict(planet_basis=np.concatenate([np.ones((t.size, 1)), pc], axis=1),
                planet_at_event=np.append(1.0, mid),
                planet_names=("planet", "planet_cos1", "planet_sin1"))


def detrend_light_curve(time, flux, variance, template, *, orbit=None, orbit_time=None,
                        scan_direction=None, mask=None, visit_order=1, orbit_order=0,
                        ramp=False, tau_grid=None, fit_tau=False, phase_curve=None,
                        tie_phase_curve=False, drop_first_orbit=False, mode="joint",
                        out_of_event_threshold=0.0):
    """Detrend one light curve with a systematics model built from covariates.

    ``mask`` is True where an exposure is bad; see :func:`fit_event` for the
    mask contract, the model and the error propagation.  Inputs are not
    modified.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        Mid-exposure times, days (BJD_TDB).
    flux, variance, template
        See :func:`fit_event`.
    orbit : array_like of int, shape (n_exposures,), optional
        Orbit numbers (:func:`lightledger.pipeline.covariates.exposure_covariates`);
        needed for ``ramp`` and ``drop_first_orbit``.
    orbit_time : array_like of float, shape (n_exposures,), optional
        Days since each orbit's start; needed for ``orbit_order > 0`` and
        ``ramp``.
    scan_direction : array_like, shape (n_exposures,), optional
        Scan direction sign; adds an offset between directions when both occur.
    mask : array_like of bool, shape (n_exposures,), optional
    visit_order : int, optional
        Order of the visit-long polynomial in time (default 1; 0 = constant).
    orbit_order : int, optional
        Order of the orbit-phase polynomial shared by the orbits (default 0).
    ramp : bool, optional
        Add a per-orbit exponential ramp ``exp(-orbit_time / tau)``.
    tau_grid : array_like of float, optional
        Ramp time scales to try, days; the one of lowest chi-square is kept.
        Default :data:`DEFAULT_TAU_GRID` (1 to 60 min).
    fit_tau : bool, optional
        Refine tau by a bounded minimisation of chi-square between the grid
        neighbours of the best grid value.
    phase_curve : (float, float), optional
        ``(t0, period)`` in days (``t0`` the mid-transit time): add
        first-harmonic phase sinusoids, as systematics columns ("cos1",
        "sin1") unless ``tie_phase_curve``.
    tie_phase_curve : bool, optional
        Eclipses, with ``phase_curve`` and ``mode="joint"``: describe the
        planet's flux as ``F_p = c0 + c1 cos + c2 sin`` of the orbital phase
        and hide it with the eclipse, ``S_* (1 + F_p (1 - s))`` (``planet_basis``
        of :func:`fit_event`, columns "planet", "planet_cos1",
        "planet_sin1"); the depth is ``F_p/(1 + F_p)`` at mid-eclipse,
        ``t0 + period/2`` (circular orbit).  Default False.
    drop_first_orbit : bool, optional
        Leave orbit 0 out of the fit (its ramp is usually the strongest;
        common practice).
    mode : {"joint", "out_of_event"}
        See :func:`fit_event`.
    out_of_event_threshold : float, optional
        See :func:`fit_event`.

    Returns
    -------
    DetrendResult
        ``coefficient_names`` name the columns ("visit^1", "orbit^1",
        "ramp[o]", "scan", "cos1", "sin1", or "planet", "planet_cos1",
        "planet_sin1" last when tied); ``n_params`` counts tau as one
        parameter when a ramp is used.

    Notes
    -----
    The options describe a :class:`~lightledger.pipeline.systematics.SystematicsModel`
    (:func:`~lightledger.pipeline.systematics.standard_model`) fitted by
    :func:`fit_light_curve`, which marginalises the depth error over a
    ramp time scale chosen from the data.

    Cost: one :func:`fit_event` per grid value of tau (plus about 20 when
    ``fit_tau``, and one to propagate tau).
    """
    t = _vector(time, "time")
    n = t.size
    base_mask = np.zeros(n, dtype=bool) if mask is None else np.asarray(mask)
    if base_mask.dtype != bool or base_mask.shape != (n,):
        raise ParameterError(f"mask must be boolean of shape ({n},) (True = bad)")
    if (orbit_order > 0 or ramp) and orbit_time is None:
        raise ParameterError("orbit_time is needed for orbit_order > 0 or ramp=True")
    if (ramp or drop_first_orbit) and orbit is None:
        raise ParameterError("orbit is needed for ramp=True or drop_first_orbit=True")
    if phase_curve is not None:
        try:
            pc_t0, pc_period = (float(x) for x in phase_curve)
        except (TypeError, ValueError):
            raise ParameterError("phase_curve must be (t0, period) in days") from None
        phase_curve_basis(t[:1], pc_t0, pc_period)   # validates the period
    planet = {}
    if tie_phase_curve:
        if phase_curve is None:
            raise ParameterError("tie_phase_curve=True needs phase_curve=(t0, period)")
        if mode != "joint":
            raise ParameterError(f"tie_phase_curve=True needs mode='joint'; got {mode!r}")
        planet = tied_phase_curve(t, pc_t0, pc_period)
    inputs = SystematicsInputs(t, orbit=orbit, orbit_time=orbit_time,
                               scan_direction=scan_direction)
    model = standard_model(visit_order=visit_order, orbit_order=orbit_order,
                           scan_offset=scan_direction is not None,
                           phase_sinusoids=None if phase_curve is None or tie_phase_curve
                           else (pc_t0, pc_period),
                           ramp=ramp, tau_grid=tau_grid, fit_tau=fit_tau)
    fit_mask = base_mask.copy()
    if drop_first_orbit:
        fit_mask |= inputs.orbit == np.min(inputs.orbit)
    return fit_light_curve(inputs, flux, variance, template, model, mask=fit_mask, mode=mode,
                           out_of_event_threshold=out_of_event_threshold, **planet)


@dataclass(frozen=True)
class ChannelFits:
    """Fits of every spectroscopic channel; returned by :func:`fit_channels`.

    Attributes
    ----------
    depth, depth_error, depth_error_unscaled, reduced_chi2, chi2, bic, tau : ndarray of float, shape (n_channels,)
        As in :class:`DetrendResult`, one per channel.
    n_params : ndarray of int, shape (n_channels,)
    systematics, model, detrended_flux, detrended_error, residuals : ndarray of float, shape (n_exposures, n_channels)
        As in :class:`DetrendResult`; with ``divide_white`` the systematics
        include the white-light shape, so that ``model`` describes the
        channel's flux as given.
    fits : tuple of DetrendResult
        The per-channel results (of the divided flux when ``divide_white``).
    white_shape : ndarray of float, shape (n_exposures,)
        The common-mode shape divided out (all ones without ``divide_white``).
    """

    depth: np.ndarray
    depth_error: np.ndarray
    depth_error_unscaled: np.ndarray
    reduced_chi2: np.ndarray
    chi2: np.ndarray
    bic: np.ndarray
    tau: np.ndarray
    n_params: np.ndarray
    systematics: np.ndarray
    model: np.ndarray
    detrended_flux: np.ndarray
    detrended_error: np.ndarray
    residuals: np.ndarray
    fits: tuple
    white_shape: np.ndarray


def fit_channels(time, flux, variance, template, *, mask=None, divide_white=None, fit=None,
                 **options):
    """Detrend every channel of a spectroscopic light curve.

    ``mask`` is True where a channel-exposure is bad (e.g.
    :attr:`lightledger.pipeline.binning.BinnedSpectra.mask`); non-finite
    values are left out as in :func:`fit_event`.  Inputs are not modified.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        Days.
    flux, variance : array_like of float, shape (n_exposures, n_channels)
    template : array_like of float, shape (n_exposures,) or (n_exposures, n_channels)
        Unit-depth event shape, shared or per channel.
    mask : array_like of bool, shape (n_exposures, n_channels), optional
    divide_white : array_like of float, shape (n_exposures,), optional
        White-light systematics model (e.g. ``DetrendResult.systematics`` of
        the white light curve).  When given, each channel's flux is divided by
        its shape ``divide_white / mean(divide_white)`` (the common mode) and
        its variance by the shape squared before the fit.
    fit : callable, optional
        ``fit(flux, variance, template, *, mask) -> DetrendResult`` for one
        channel, e.g. a :func:`functools.partial` of :func:`fit_light_curve`
        with the visit's inputs and a systematics model; default
        :func:`detrend_light_curve` with ``time`` and ``**options``.
    **options
        Keyword options of :func:`detrend_light_curve` (orbit, orbit_time,
        visit_order, ramp, mode, ...), the same for every channel; only
        without ``fit``.

    Returns
    -------
    ChannelFits

    Notes
    -----
    Dividing by a fixed shape :math:`g_i` scales each exposure's flux and
    standard deviation alike, :math:`\\mathrm{Var}(f_i/g_i) = \\sigma_i^2/g_i^2`;
    the white model's own uncertainty is not propagated.  A loop over
    channels: cost n_channels times that of :func:`detrend_light_curve`.

    References
    ----------
    Kreidberg et al. 2014, Nature 505, 69; Deming et al. 2013, ApJ 774, 95
    (common-mode and divide-white corrections).
    """
    t = _vector(time, "time")
    n = t.size
    F = np.asarray(flux, dtype=float)
    V = np.asarray(variance, dtype=float)
    if F.ndim != 2 or F.shape[0] != n:
        raise ParameterError(f"flux must have shape ({n}, n_channels); got {F.shape}")
    if V.shape != F.shape:
        raise ParameterError(f"variance must have the shape of flux {F.shape}; got {V.shape}")
    n_ch = F.shape[1]
    T = np.asarray(template, dtype=float)
    if T.shape == (n,):
        T = np.broadcast_to(T[:, None], F.shape)
    elif T.shape != F.shape:
        raise ParameterError(f"template must have shape ({n},) or {F.shape}; got {T.shape}")
    if mask is None:
        M = np.zeros(F.shape, dtype=bool)
    else:
        M = np.asarray(mask)
        if M.dtype != bool or M.shape != F.shape:
            raise ParameterError(f"mask must be boolean of shape {F.shape} (True = bad)")
    if divide_white is None:
        g = np.ones(n)
    else:
        w = _vector(divide_white, "divide_white", n)
        ok = np.isfinite(w)
        if not np.any(ok) or np.mean(w[ok]) == 0:
            raise ParameterError("divide_white must have finite values with a non-zero mean")
        g = w / np.mean(w[ok])
    per_exp_mask = options.pop("mask", None)
    if per_exp_mask is not None:
        raise ParameterError("give the mask as mask= of shape (n_exposures, n_channels)")
    if fit is None:
        fit = partial(_fit_with_options, t, options)
    elif options:
        raise ParameterError("give either fit= or the keyword options of detrend_light_curve")
    fits = []
    for j in range(n_ch):
        with np.errstate(divide="ignore", invalid="ignore"):
            fj, vj = F[:, j] / g, V[:, j] / (g * g)
        fits.append(fit(fj, vj, T[:, j], mask=M[:, j]))

    def col(attr):
        return np.array([getattr(r, attr) for r in fits])

    def stack(attr):
        return np.stack([getattr(r, attr) for r in fits], axis=1)

    return ChannelFits(
        depth=col("depth"), depth_error=col("depth_error"),
        depth_error_unscaled=col("depth_error_unscaled"), reduced_chi2=col("reduced_chi2"),
        chi2=col("chi2"), bic=col("bic"), tau=col("tau"), n_params=col("n_params").astype(int),
        systematics=stack("systematics") * g[:, None], model=stack("model") * g[:, None],
        detrended_flux=stack("detrended_flux"), detrended_error=stack("detrended_error"),
        residuals=stack("residuals"), fits=tuple(fits), white_shape=g)




def _fit_with_options(time, options, flux, variance, template, *, mask):
    return detrend_light_curve(time, flux, variance, template, mask=mask, **options)
