"""White light first: the event's timing and geometry fitted with the systematics.

The white light curve has the most signal, so it is fitted first with the
event's mid-time (and optionally a/Rs and the inclination) free, starting
from the a priori ephemeris; the spectroscopic channels then take the white
light's geometry, mid-time and the systematics' nonlinear shape parameters
(ramp time scales, trap time scales) and fit only their linear terms and
depth (:mod:`lightledger.pipeline.grid`).  Fitting each channel's own ramp
time scale instead lets it wander to the ends of its grid and inflates the
channel errors with an uncertainty the white light has already settled.

The fit alternates: the shape parameters are chosen by chi-square on their
grids with the event fixed
(:func:`~lightledger.pipeline.shapesearch.search_shapes`), then the event
parameters are optimised with the shapes fixed (a scan of the mid-time over
a window, then a bounded or simplex minimisation), until the chi-square no
longer improves by 0.01; the depth's error is then marginalised to first
order over every free nonlinear parameter (shapes and event) through the
Jacobian (:func:`lightledger.pipeline.fiterrors.linearise_fit`).

Times are days (BJD_TDB), angles degrees.  Masks: True = left out of the
fit.  Inputs are not modified.
"""

from dataclasses import dataclass, replace

import numpy as np
from scipy.optimize import minimize, minimize_scalar

from .errors import ParameterError
from .eventfit import fit_event, with_shapes
from .fiterrors import linearise_fit
from .components import TiedOrbitRamp, trap_limits
from .shapesearch import ramp_limits, search_shapes
from .systematics import OrbitRamp
from .transit import eclipse_flux, transit_flux

__all__ = ["GEOMETRY_PARAMS", "WhiteFit", "event_template", "template_derivatives",
           "fit_white", "fit_at_shapes", "radius_fixed_point"]

#: Event parameters the white light may fit.
GEOMETRY_PARAMS = ("t0", "a_rs", "inclination")
#: Finite-difference steps of the event parameters (days, stellar radii relative, degrees).
_STEPS = {"t0": 2e-5, "a_rs": 1e-4, "inclination": 2e-3}


def event_template(time, event, **overrides):
    """Unit-depth event shape from an ephemeris.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        BJD_TDB, days.
    event : dict
        ``kind`` ("transit" or "eclipse"), ``t0``, ``period`` (days),
        ``rp_rs``, ``a_rs``, ``inclination`` (deg), ``u1``, ``u2``.
    **overrides
        Values replacing those of ``event``; ``u1`` and ``u2`` may be arrays
        of shape (n_channels,), giving one template per channel.

    Returns
    -------
    ndarray of float, shape (n_exposures,) or (n_exposures, n_channels)
        Transit: ``(1 - model) / rp_rs**2`` (Mandel & Agol 2002 with quadratic
        limb darkening), so that the fitted depth is the (rp/rs)^2 of the
        band.  Eclipse: the hidden fraction of a uniform planet disk, 0 out of
        eclipse and 1 in full eclipse.
    """
    e = {**event, **overrides}
    t = np.asarray(time, dtype=float)
    shape = dict(t0=e["t0"], period=e["period"], rp_rs=e["rp_rs"], a_rs=e["a_rs"],
                 inclination=e["inclination"])
    u1, u2 = np.asarray(e["u1"], float), np.asarray(e["u2"], float)
    if e["kind"] == "transit":
        tt = t[:, None] if u1.ndim or u2.ndim else t
        model = transit_flux(tt, u1=u1, u2=u2, **shape)
        return (1.0 - model) / e["rp_rs"] ** 2
    hidden = 1.0 - (eclipse_flux(t, fp_fs=1.0, **shape) - 1.0)
    if u1.ndim or u2.ndim:            # limb darkening does not shape an eclipse
        n_ch = np.broadcast_shapes(u1.shape, u2.shape)[0]
        return np.repeat(hidden[:, None], n_ch, axis=1)
    return hidden


def template_derivatives(time, event, names, **overrides):
    """Central differences of :func:`event_template` with respect to event parameters.

    Returns
    -------
    ndarray of float, shape (len(names), n_exposures)
    """
    e = {**event, **overrides}
    out = []
    for name in names:
        h = _STEPS[name] * (e[name] if name == "a_rs" else 1.0)
        up = event_template(time, e, **{name: e[name] + h})
        dn = event_template(time, e, **{name: e[name] - h})
        out.append((up - dn) / (2 * h))
    return np.array(out).reshape(len(names), -1)


@dataclass(frozen=True)
class WhiteFit:
    """The white light curve's fit; returned by :func:`fit_white`.

    Attributes
    ----------
    result : DetrendResult
        The fit at the chosen shapes and event; ``depth_error`` (and the
        unscaled one) marginalised over the free shapes and event
        parameters, ``n_params`` counting them, ``shapes`` listing the shape
        values.
    event : dict
        The event with the fitted values of the free parameters.
    event_errors : dict
        One-sigma errors of the free event parameters (scaled like the
        depth's).
    shapes : dict
        Qualified shape-parameter names to chosen values.
    template : ndarray of float, shape (n_exposures,)
    linearisation : FitLinearisation
        The model linearised at the solution (all free parameters).
    n_fits : int
        Light-curve fits evaluated.
    """

    result: object
    event: dict
    event_errors: dict
    shapes: dict
    template: np.ndarray
    linearisation: object
    n_fits: int


def fit_at_shapes(inputs, flux, variance, template, model, shapes, *, mask=None, **event_options):
    """Fit ``model`` with its shape parameters held at ``shapes`` (linear terms and depth only).

    Returns
    -------
    (DetrendResult, Design)
        The fit (``n_params`` counts only what was fitted) and the design used.
    """
    design = model.design(inputs, shapes)
    res = fit_event(flux, variance, template, design.columns, mask=mask, basis_names=design.names,
                    **event_options)
    return res, design


def fit_white(inputs, flux, variance, model, event, *, free=("t0",), mask=None, window=None,
              max_cycles=3, **event_options):
    """Fit the white light curve with the event's timing (and geometry) free.

    Parameters
    ----------
    inputs : SystematicsInputs
    flux, variance : array_like of float, shape (n_exposures,)
    model : SystematicsModel
    event : dict
        A priori event (see :func:`event_template`); its values start the fit.
    free : sequence of str, optional
        Event parameters to fit, from :data:`GEOMETRY_PARAMS` (default the
        mid-time alone; empty = the a priori event).
    mask : array_like of bool, shape (n_exposures,), optional
    window : float, optional
        Half-width (days) of the mid-time scan; default a quarter of
        ``event["duration"]``.
    max_cycles : int, optional
        Alternations of shape search and event optimisation at most.
    **event_options
        Options of :func:`~lightledger.pipeline.eventfit.fit_event` (``mode``,
        planet columns, ...).

    Returns
    -------
    WhiteFit

    Notes
    -----
    For a transit the template is finally remade at the fitted radius until
    it stops changing (:func:`radius_fixed_point`), so that the depth is the
    limb-darkened model's (rp/rs)^2 and ``event["rp_rs"]`` its square root.
    Bounds: a/Rs > 1 (the planet outside the star), inclination in (0, 90]
    degrees.  The chi-square of the event parameters
    is profiled over the systematics' linear terms and depth.  Cost: one fit
    per shape-grid value per cycle, about 20 + 15 per free event parameter
    per cycle for the event.
    """
    free = tuple(free)
    for name in free:
        if name not in GEOMETRY_PARAMS:
            raise ParameterError(f"free event parameters must be among {', '.join(GEOMETRY_PARAMS)}; "
                                 f"got {name!r}")
    current = dict(event)
    count = [0]
    templates = {}

    designs = {}

    def fit(ev, shapes, derivatives=False):
        count[0] += 1
        key = tuple(sorted((k, float(v)) for k, v in shapes.items()))
        if key not in designs:          # the event's trials share the shapes' design
            if len(designs) > 64:
                designs.clear()
            designs[key] = model.design(inputs, shapes)
        design = designs[key]
        key = tuple(float(ev[k]) for k in GEOMETRY_PARAMS)
        if key not in templates:
            templates[key] = event_template(inputs.time, ev)
        return fit_event(flux, variance, templates[key], design.columns,
                         mask=mask, basis_names=design.names,
                         basis_derivatives=design.derivatives if derivatives else None,
                         **event_options)

    shapes, chi_prev = {}, np.inf
    limits = ramp_limits(inputs, model, mask, (OrbitRamp, TiedOrbitRamp))
    params, own = trap_limits(model, inputs, mask)    # trap time scales: not tried outside them
    limits.update(own)
    for _cycle in range(max(int(max_cycles), 1)):
        search = search_shapes(lambda values: fit(current, values), params, limits=limits)
        shapes = search.values
        chi = search.result.chi2
        if free:
            current, chi = _optimise_event(lambda ev: fit(ev, shapes).chi2, current, free,
                                           window if window is not None
                                           else 0.25 * float(event.get("duration", 0.1)))
        if not params or chi > chi_prev - 0.01:
            break                # nothing to alternate with, or converged
        chi_prev = chi
    design = model.design(inputs, shapes)
    template = event_template(inputs.time, current)
    res = fit_event(flux, variance, template, design.columns, mask=mask, basis_names=design.names,
                    **event_options)
    count[0] += 1
    if current["kind"] == "transit":
        current, template, res, n = radius_fixed_point(
            lambda ev: event_template(inputs.time, ev),
            lambda tm: fit_event(flux, variance, tm, design.columns, mask=mask,
                                 basis_names=design.names, **event_options),
            current, template, res)
        count[0] += n
    chosen = any(len(sp.grid) > 1 or sp.refine for _, sp in params)
    lin = linearise_fit(res, design.columns, template, variance,
                        basis_derivatives=design.derivatives if chosen else None,
                        template_derivatives=template_derivatives(inputs.time, current, free)
                        if free else None,
                        planet_basis=event_options.get("planet_basis"),
                        planet_at_event=event_options.get("planet_at_event"))
    var = lin.depth_variance()
    # with_shapes counts each listed value as a free parameter: the shapes chosen
    # from the data and the free event parameters.
    res = replace(res, depth_error_unscaled=float(np.sqrt(var)))
    res = with_shapes(res, {**(shapes if chosen else {}), **{f"event.{k}": current[k] for k in free}},
                      tau=_ramp_tau(model, shapes), at_edge=search.at_edge)
    errors = _event_errors(lin, free, res.error_scale)
    return WhiteFit(result=res, event=current, event_errors=errors, shapes=dict(shapes),
                    template=template, linearisation=lin, n_fits=count[0])


def radius_fixed_point(template_of, fit, event, template, result, *, max_iter=8, tol=1e-10):
    """Remake a transit's template at the fitted radius until it stops changing.

    A limb-darkened transit's shape depends on the radius ratio (ingress,
    egress, the limb's curvature), so a template made at the a priori radius
    and scaled by the fitted depth is not the transit of a planet of the
    fitted size.  The fit is repeated with the template made at
    ``rp = sqrt(depth)``; at the fixed point ``depth * s(sqrt(depth)) = 1 -
    F(sqrt(depth))``, the limb-darkened transit itself (Mandel & Agol 2002),
    so the depth is that model's (rp/rs)^2.

    Parameters
    ----------
    template_of : callable
        ``template_of(event) -> template`` (e.g. :func:`event_template`).
    fit : callable
        ``fit(template) -> DetrendResult`` at fixed everything else.
    event, template, result
        The event, its template and the fit made with it.
    max_iter, tol
        Refits at most (two or three suffice: the map contracts strongly) and
        the largest template change that ends them.

    Returns
    -------
    (event, template, result, n_refits)
        ``event["rp_rs"]`` is the fitted radius ratio.
    """
    n = 0
    for _ in range(int(max_iter)):
        if not (np.isfinite(result.depth) and result.depth > 0):
            break
        trial = dict(event, rp_rs=float(np.sqrt(result.depth)))
        new = np.asarray(template_of(trial), dtype=float)
        if np.nanmax(np.abs(new - template)) < tol:
            break
        event, template = trial, new
        result = fit(template)
        n += 1
    return event, template, result, n


def _ramp_tau(model, shapes):
    for comp in model.components:
        if comp.label == "ramp" and f"{comp.label}.tau" in shapes:
            return float(shapes[f"{comp.label}.tau"])
    return float("nan")


def _event_errors(lin, free, scale):
    """One-sigma errors of the free event parameters from the linearisation."""
    if not free:
        return {}
    cov = lin.covariance()              # the time scales held as for the depth's error
    k = lin.jacobian.shape[1] - len(free)
    return {name: float(np.sqrt(cov[k + j, k + j]) * scale) for j, name in enumerate(free)}


def _optimise_event(chi_of, event, free, window):
    """Minimise ``chi_of(event)`` over the free event parameters; returns (event, chi2)."""
    ev = dict(event)

    def with_values(x):
        out = dict(ev)
        for name, value in zip(free, x):
            out[name] = float(value)
        return out

    def safe(x):
        trial = with_values(x)
        if trial["a_rs"] <= 1.0 or trial["inclination"] > 90.0 or trial["inclination"] <= 0:
            return np.inf
        try:
            return chi_of(trial)
        except ParameterError:
            return np.inf            # an event that leaves every fitted exposure

    x0 = np.array([ev[k] for k in free], float)
    if "t0" in free and window > 0:
        j = free.index("t0")
        scan = x0[j] + np.linspace(-window, window, 11)
        chis = []
        for t0 in scan:
            x = x0.copy()
            x[j] = t0
            chis.append(safe(x))
        x0[j] = scan[int(np.argmin(chis))]
        step_t0 = 2 * window / 10
    else:
        step_t0 = 0.002
    if len(free) == 1:
        # Offsets from the start, so that the optimiser's relative tolerance does not
        # swallow a mid-time of 2.4 million days.
        name = free[0]
        step = {"t0": step_t0, "a_rs": 0.05 * x0[0], "inclination": 0.5}[name]
        hi = min(step, 90.0 - x0[0]) if name == "inclination" else step
        opt = minimize_scalar(lambda d: safe([x0[0] + d]), bounds=(-step, max(hi, 0.0)),
                              method="bounded",
                              options={"xatol": 1e-7 if name == "t0" else 1e-6})
        best = np.array([x0[0] + opt.x])
    else:
        scale = np.array([{"t0": step_t0, "a_rs": 0.05 * ev["a_rs"], "inclination": 0.5}[k]
                          for k in free])
        opt = minimize(lambda z: safe(x0 + z * scale), np.zeros(len(free)), method="Nelder-Mead",
                       options={"xatol": 1e-4, "fatol": 1e-4, "maxiter": 400})
        best = x0 + opt.x * scale
    if safe(best) > safe(x0):
        best = x0
    return with_values(best), float(safe(best))
