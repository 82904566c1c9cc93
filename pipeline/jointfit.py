"""Joint fit of several visits of one planet: per-visit systematics, one planet.

Each visit :math:`v` has its own systematics model
(:class:`~lightledger.pipeline.systematics.SystematicsModel`) with its own
flux level; every visit shares the planet: its radius ratio :math:`p` and the
coefficients :math:`c` of its flux over the orbit.  The flux of exposure
:math:`i` of visit :math:`v` is

.. math:: f_{vi} = S_{vi}\\, E(t_{vi}; p, c), \\qquad S_v = B_v a_v,

with :math:`E` the full-orbit model of :mod:`lightledger.pipeline.phasecurve`
(star alone = 1) and :math:`B_v` the visit's design matrix with a constant
column first, so :math:`S_v` is the star's flux times the visit's
systematics.  A single visit is the case of one.  The fit minimises the
weighted sum of squares over every visit by Gauss-Newton iterations with step
halving from a linearised start; the visits' nonlinear shape parameters (ramp
time scales) are chosen by :func:`~lightledger.pipeline.shapesearch.search_shapes`
and marginalised to first order as in the single-visit fit.

What the data can tell: the planet's flux is fitted only when some fitted
exposure falls in an eclipse (otherwise its constant is the star's level
under another name), and the radius ratio only when some fitted exposure
falls in a transit; otherwise they are held at their a priori values and
reported as not fitted.  Covariances come from the SVD of the weighted,
column-normalised Jacobian (:func:`~lightledger.pipeline.leastsq.weighted_lstsq`).
Errors are multiplied by the square root of the reduced chi-square when it
exceeds 1.

Masks: True where an exposure is bad; such exposures, and those with a
non-finite flux or non-positive variance, are not fitted, but every
per-exposure output covers all exposures.  Inputs are not modified.  Pure
functions on arrays: per-visit light curves in, shared parameters out.
"""

from dataclasses import dataclass, field

import numpy as np

from .errors import AllMaskedError, ParameterError
from .jointsolve import designs, prepare, solve
from .orbit import Ephemeris
from .phasecurve import event_shapes, planet_columns, planet_names, summarise_planet
from .shapesearch import search_shapes
from .systematics import OrbitRamp, SystematicsInputs, SystematicsModel

__all__ = ["VisitData", "PlanetModel", "VisitFit", "JointFit", "fit_joint"]


@dataclass(frozen=True)
class VisitData:
    """One visit's light curve and systematics model.

    Attributes
    ----------
    inputs : SystematicsInputs
        Times (BJD_TDB, days) and covariates.
    flux, variance : ndarray of float, shape (n_exposures,)
        Flux (any unit) and its variance.
    model : SystematicsModel
    mask : ndarray of bool, shape (n_exposures,), optional
        True where an exposure is bad.
    name : str
    """

    inputs: SystematicsInputs
    flux: np.ndarray
    variance: np.ndarray
    model: SystematicsModel
    mask: np.ndarray | None = None
    name: str = ""


@dataclass(frozen=True)
class PlanetModel:
    """The shared astrophysical model.

    Attributes
    ----------
    ephemeris : Ephemeris
    rp_rs : float
        A priori radius ratio (the start, and the value used when not fitted).
    u1, u2 : float
        Quadratic limb darkening.
    harmonics : int
        Harmonics of the planet's flux (1 or 2).
    fit_radius : bool
        Fit the radius ratio when a transit is in the data.
    """

    ephemeris: Ephemeris
    rp_rs: float
    u1: float = 0.0
    u2: float = 0.0
    harmonics: int = 1
    fit_radius: bool = True


@dataclass(frozen=True)
class VisitFit:
    """Per-visit outcome of :func:`fit_joint`; arrays of shape (n_exposures,).

    Attributes
    ----------
    name : str
    systematics : ndarray
        :math:`S_v`: the star's flux times the systematics (flux units).
    model : ndarray
        :math:`S_v E`.
    astro : ndarray
        :math:`E`, the full-orbit model relative to the star.
    detrended, detrended_error : ndarray
        ``flux / systematics`` and its error: the whole astrophysical
        signal, 1 = the star alone.
    residuals : ndarray
        ``detrended - astro``.
    blocked, visible, angle : ndarray
        Transit's hidden fraction of the star, the planet's visible
        fraction, orbital angle from transit (radians).
    fit_mask : ndarray of bool
        True where the exposure was left out.
    coefficients : ndarray
        :math:`a_v` (the first is the star's flux level).
    coefficient_names : tuple of str
    shapes : tuple of (str, float)
        Shape parameters chosen (qualified names).
    tau : float
        Ramp time scale, days (NaN without a ramp).
    chi2 : float
        This visit's share of the chi-square.
    n_points : int
    """

    name: str
    systematics: np.ndarray
    model: np.ndarray
    astro: np.ndarray
    detrended: np.ndarray
    detrended_error: np.ndarray
    residuals: np.ndarray
    blocked: np.ndarray
    visible: np.ndarray
    angle: np.ndarray
    fit_mask: np.ndarray
    coefficients: np.ndarray
    coefficient_names: tuple
    shapes: tuple
    tau: float
    chi2: float
    n_points: int


@dataclass(frozen=True)
class JointFit:
    """The shared planet and every visit's fit; returned by :func:`fit_joint`.

    Attributes
    ----------
    rp_rs, rp_rs_error : float
        Radius ratio and its error (error NaN when not fitted).
    transit_depth, transit_depth_error : float
        ``rp_rs**2`` and its error.
    planet : ndarray of float, shape (1 + 2 h,)
        Planet flux coefficients (:func:`~lightledger.pipeline.phasecurve.planet_columns`);
        zeros when not fitted.
    planet_covariance : ndarray of float, shape (1 + 2 h, 1 + 2 h)
        Their covariance (scaled by ``error_scale``).
    planet_names : tuple of str
    summary : PhaseCurveSummary or None
        Day and night sides, extremes, amplitude, offset (None when the
        planet's flux was not fitted).
    fitted_radius, fitted_planet : bool
    chi2, reduced_chi2, error_scale, bic : float
    n_params, n_points : int
        Free parameters (every visit's columns and shape parameters, the
        planet's coefficients and the radius when fitted) and fitted
        exposures.
    visits : tuple of VisitFit
    covariance : ndarray of float, shape (n, n)
        Covariance of every linear parameter fitted (scaled by
        ``error_scale``; the visits' shape parameters marginalised to first
        order), in the order of ``parameter_names``.
    parameter_names : tuple of str
        ``"VISIT:NAME"`` for visit ``VISIT``'s (1 = first) systematics
        coefficients (the active columns of :attr:`VisitFit.coefficient_names`),
        then the planet's coefficients (:attr:`planet_names`) when the
        planet's flux was fitted and ``rp_rs`` when the radius was.
    """

    rp_rs: float
    rp_rs_error: float
    transit_depth: float
    transit_depth_error: float
    planet: np.ndarray
    planet_covariance: np.ndarray
    planet_names: tuple
    summary: object
    fitted_radius: bool
    fitted_planet: bool
    chi2: float
    reduced_chi2: float
    error_scale: float
    bic: float
    n_params: int
    n_points: int
    visits: tuple = field(default_factory=tuple)
    covariance: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    parameter_names: tuple = ()


# --------------------------------------------------------------------------
# The fit
# --------------------------------------------------------------------------

def _identifiable(prep, planet):
    """(fit the radius, fit the planet's flux) from the fitted exposures' events."""
    sh = [event_shapes(p.data.inputs.time, planet.ephemeris, planet.rp_rs, planet.u1, planet.u2,
                       state=p.state) for p in prep]
    in_transit = sum(int(np.count_nonzero(s.blocked[p.use] > 0)) for s, p in zip(sh, prep))
    in_eclipse = sum(int(np.count_nonzero(s.visible[p.use] < 0.99)) for s, p in zip(sh, prep))
    return planet.fit_radius and in_transit >= 3, in_eclipse >= 2


def fit_joint(visits, planet, *, max_iter=60):
    """Fit every visit's systematics and one shared planet.

    Parameters
    ----------
    visits : sequence of VisitData
        One or more visits of the planet (each its own times, flux, mask and
        systematics model).
    planet : PlanetModel
        The ephemeris, a priori radius ratio, limb darkening and harmonics.
    max_iter : int, optional
        Gauss-Newton iterations at most per fit.

    Returns
    -------
    JointFit

    Notes
    -----
    Jacobian columns, with :math:`E = 1 - \\lambda + F_p v` and :math:`S_v =
    B_v a_v`: :math:`\\partial f/\\partial a_v = B_v E` (visit :math:`v`'s rows
    only), :math:`\\partial f/\\partial c = S P v`,
    :math:`\\partial f/\\partial p = S(-\\partial\\lambda/\\partial p + F_p
    \\partial v/\\partial p)`, and for a shape parameter :math:`\\theta` of
    visit :math:`v` (e.g. :math:`\\ln\\tau`), :math:`(\\partial B_v/\\partial
    \\theta\\, a_v) E`.  The covariance is that of the enlarged problem,
    restricted to the fitted parameters (first-order marginalisation over
    the shape parameters).  The transit depth's error is
    :math:`2 p \\sigma_p`.

    Cost: per evaluation O(n_iter n_exposures n_params^2); the shape search
    multiplies it by the grid sizes (one visit's grid at a time).

    References
    ----------
    Cowan & Agol 2008, ApJ 678, L129 (phase curve); Mandel & Agol 2002, ApJ
    580, L171 (transit); joint fits of visits with independent systematics
    and one planet: common practice.
    """
    visits = tuple(visits)
    if not visits:
        raise ParameterError("give at least one visit to fit")
    if not isinstance(planet, PlanetModel):
        raise ParameterError("planet must be a PlanetModel")
    prep = [prepare(v, planet.ephemeris) for v in visits]
    if not any(p.use.any() for p in prep):
        raise AllMaskedError("every exposure of every visit is masked or non-finite")
    fit_rp, fit_pl = _identifiable(prep, planet)
    params = []
    for i, p in enumerate(prep):
        params += [(f"{i}:{name}", sp) for name, sp in p.data.model.shape_params()]

    def split(values):
        out = [{} for _ in prep]
        for key, val in values.items():
            i, name = key.split(":", 1)
            out[int(i)][name] = val
        return out

    class _Eval:
        def __init__(self, sol, des):
            self.sol, self.des, self.chi2 = sol, des, sol["chi2"]

    cache = {}
    last = []

    def evaluate(values, derivatives=False):
        des = designs(prep, split(values))
        sol = solve(prep, des, planet, fit_rp, fit_pl, max_iter, derivatives, cache,
                    start=last[-1] if last else None)
        last[:] = [(sol["c"], sol["rp"])]
        return _Eval(sol, des)

    search = search_shapes(evaluate, params)
    best = search.result
    if search.chosen_from_data:
        best = evaluate(search.values, derivatives=True)
    return _assemble(prep, best.sol, best.des, planet, fit_rp, fit_pl, split(search.values),
                     len(params))


def _assemble(prep, sol, des, planet, fit_rp, fit_pl, shapes_by_visit, n_shapes):
    n_params = sol["n_params"] + n_shapes
    n_points = sol["n_points"]
    dof = n_points - n_params
    if dof <= 0:
        raise ParameterError(f"need more fitted exposures ({n_points}) than parameters "
                             f"({n_params}); use smaller systematics models")
    chi2 = float(sol["chi2"])
    red = chi2 / dof
    scale = float(np.sqrt(red)) if red > 1 else 1.0
    cov = sol["cov"] * scale ** 2
    n_a, n_c = sol["n_a"], sol["n_c"]
    h = planet.harmonics
    if fit_pl:
        pc = cov[n_a:n_a + n_c, n_a:n_a + n_c]
        summary = summarise_planet(sol["c"], pc)
    else:
        pc = np.full((n_c, n_c), np.nan)
        summary = None
    rp = float(sol["rp"])
    rp_err = float(np.sqrt(cov[-1, -1])) if fit_rp else float("nan")
    vfits = []
    names = [f"{j + 1}:{name}" for j, d in enumerate(des)
             for name, on in zip(d["names"], d["active"]) if on]
    names += list(planet_names(h)) if fit_pl else []
    names += ["rp_rs"] if fit_rp else []
    for j, (p, d) in enumerate(zip(prep, des)):
        a = sol["a"][sol["offsets"][j]:sol["offsets"][j + 1]]
        sh = sol["sh"][j]
        S = d["B"] @ a
        Fp = planet_columns(p.state.angle, h) @ sol["c"]
        E = 1.0 - sh.blocked + Fp * sh.visible
        with np.errstate(divide="ignore", invalid="ignore"):
            det = p.f / S
            det_err = np.sqrt(p.v) / np.abs(S)
        use = d["use"]
        coef = np.zeros(d["n_all"])
        coef[d["active"]] = a
        r = (p.f - S * E)[use]
        values = shapes_by_visit[j]
        ramps = [c for c in p.data.model.components if isinstance(c, OrbitRamp)]
        tau = values.get(f"{ramps[0].label}.tau", float("nan")) if ramps else float("nan")
        vfits.append(VisitFit(
            name=p.data.name, systematics=S, model=S * E, astro=E, detrended=det,
            detrended_error=det_err, residuals=det - E, blocked=sh.blocked, visible=sh.visible,
            angle=p.state.angle, fit_mask=~use, coefficients=coef, coefficient_names=d["names"],
            shapes=tuple((k, float(v)) for k, v in values.items()), tau=float(tau),
            chi2=float(np.sum(r * r / p.v[use])), n_points=int(use.sum())))
    return JointFit(
        rp_rs=rp, rp_rs_error=rp_err, transit_depth=rp * rp,
        transit_depth_error=2 * rp * rp_err if fit_rp else float("nan"),
        planet=np.array(sol["c"]), planet_covariance=pc, planet_names=planet_names(h),
        summary=summary, fitted_radius=bool(fit_rp), fitted_planet=bool(fit_pl), chi2=chi2,
        reduced_chi2=float(red), error_scale=scale,
        bic=float(chi2 + n_params * np.log(n_points)), n_params=int(n_params),
        n_points=int(n_points), visits=tuple(vfits), covariance=cov,
        parameter_names=tuple(names))
