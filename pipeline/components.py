"""More systematics components: visit exponential, tied orbit ramps, charge trapping, decorrelation.

Each class here is a component of a
:class:`~lightledger.pipeline.systematics.SystematicsModel` (a frozen
dataclass with a ``label``, a ``shapes`` tuple of
:class:`~lightledger.pipeline.systematics.ShapeParam` and a ``block(inputs,
shape)`` method returning a :class:`~lightledger.pipeline.systematics.Block`),
beside the visit polynomial, orbit-phase polynomial, per-orbit ramp and scan
offset of :mod:`lightledger.pipeline.systematics`.  Every column is an
additive term in units of the flux level, :math:`S = F_0 (1 + \\sum_k b_k
X_k)`, linear in its amplitude :math:`b_k` for fixed shape parameters.

Inputs read from :class:`~lightledger.pipeline.systematics.SystematicsInputs`:
``time`` (days), ``orbit``, ``orbit_time`` (days) and the named covariates
``exposure_start`` (seconds, any zero point), ``exposure_time`` (seconds)
and ``trap_rate`` (electrons per second per pixel, per light curve) for the
charge-trapping ramp, and any covariate named in a decorrelation.  Masks do
not enter: columns are evaluated on every exposure (NaN where a covariate is
not finite, which the fits leave out).  Inputs are not modified.
"""

from dataclasses import dataclass, replace
from functools import cached_property

import numpy as np

from .errors import ParameterError
from .systematics import DEFAULT_TAU_GRID, Block, ShapeParam
from .traps import trap_ramp_basis

__all__ = ["VisitExponential", "TiedOrbitRamp", "TrapRamp", "Decorrelation",
           "DEFAULT_VISIT_TAU_GRID", "DEFAULT_FILL_GRIDS", "DEFAULT_RELEASE_GRIDS",
           "trap_limits"]

#: Time scales of the visit-long exponential, days (30 min to 2 days, log-spaced).
DEFAULT_VISIT_TAU_GRID = tuple(np.geomspace(30.0, 2880.0, 9) / 1440.0)
#: Fill times of the fast and slow trap populations at the reference rate, seconds.
DEFAULT_FILL_GRIDS = (tuple(np.geomspace(20.0, 2000.0, 7)), tuple(np.geomspace(200.0, 2.0e4, 7)))
#: Release times of the fast and slow trap populations, seconds.
DEFAULT_RELEASE_GRIDS = (tuple(np.geomspace(60.0, 3000.0, 6)), tuple(np.geomspace(3000.0, 1.0e5, 6)))


def _positive_grid(grid, name):
    g = np.unique(np.asarray(grid, dtype=float).ravel())
    if g.size < 1 or not np.all(np.isfinite(g) & (g > 0)):
        raise ParameterError(f"{name} must be finite values > 0")
    return tuple(float(x) for x in g)


@dataclass(frozen=True)
class VisitExponential:
    """Visit-long exponential in time, :math:`e^{-(t - t_1)/\\tau}`; column ``LABEL``.

    :math:`t_1` is the first exposure's time; with the fit's constant the
    column spans a ramp over the whole visit that levels off, the usual
    alternative to a visit-long polynomial (Wakeford et al. 2016, ApJ 819,
    10, their visit-long systematics; Berta et al. 2012, ApJ 747, 35).  The
    time scale ``tau`` (days) is chosen from ``tau_grid``; the derivative
    with respect to :math:`\\ln\\tau` is :math:`((t - t_1)/\\tau)
    e^{-(t - t_1)/\\tau}`.
    """

    tau_grid: tuple = DEFAULT_VISIT_TAU_GRID
    refine: bool = False
    label: str = "visitexp"

    @cached_property             # validated once; the fits ask for it at every design
    def shapes(self):
        return (ShapeParam("tau", _positive_grid(self.tau_grid, "tau_grid"), refine=self.refine),)

    def block(self, inputs, shape):
        t = inputs.time - np.nanmin(inputs.time)
        tau = float(shape["tau"])
        col = np.exp(-t / tau)[:, None]
        return Block(col, (self.label,), (col * (t / tau)[:, None],))


@dataclass(frozen=True)
class TiedOrbitRamp:
    """Orbit ramps :math:`e^{-t_{orb}/\\tau}` with amplitudes tied between orbits.

    ``amplitudes="shared"``: one column, one amplitude for every orbit
    (``LABEL``).  ``amplitudes="first"``: the first orbit its own amplitude
    (``LABEL[first]``) and the later orbits one shared amplitude
    (``LABEL[later]``); the first orbit's ramp is usually the strongest
    (Kreidberg et al. 2014, Nature 505, 69; Zhou et al. 2017, AJ 153, 243).
    One time scale ``tau`` (days) from ``tau_grid``; the per-orbit free
    amplitudes are :class:`~lightledger.pipeline.systematics.OrbitRamp`.
    """

    amplitudes: str = "shared"
    tau_grid: tuple = tuple(DEFAULT_TAU_GRID)
    refine: bool = False
    label: str = "ramp"

    def __post_init__(self):
        if self.amplitudes not in ("shared", "first"):
            raise ParameterError(f"amplitudes must be 'shared' or 'first'; got {self.amplitudes!r}")

    @cached_property             # validated once; the fits ask for it at every design
    def shapes(self):
        return (ShapeParam("tau", _positive_grid(self.tau_grid, "tau_grid"), refine=self.refine),)

    def block(self, inputs, shape):
        ot = inputs.need("orbit_time", self.label)
        tau = float(shape["tau"])
        e = np.exp(-ot / tau)
        if self.amplitudes == "shared":
            cols, names = e[:, None], (self.label,)
        else:
            orb = inputs.need("orbit", self.label)
            first = orb == np.min(orb)
            cols = np.stack([np.where(first, e, 0.0), np.where(first, 0.0, e)], axis=1)
            names = (f"{self.label}[first]", f"{self.label}[later]")
        return Block(cols, names, (cols * (ot / tau)[:, None],))


@dataclass(frozen=True)
class TrapRamp:
    """Charge-trapping ramp of one or two trap populations (Zhou et al. 2017, AJ 153, 243).

    The recorded fraction of the incident charge is :math:`1 - \\sum_p \\eta_p
    G_p` with :math:`G_p` the loss per unit trapping efficiency of
    :func:`lightledger.pipeline.traps.trap_ramp_basis`, for traps empty when
    the visit starts and refilled only by the light (no refill between
    orbits); with the fit's constant the efficiencies enter linearly
    (columns ``LABEL{p}``).  The shape parameters of population p are
    ``fill{p}``, the time (s) the population takes to fill at the reference
    rate, :math:`1/(\\kappa_p f_{ref})`, and ``release{p}``, its release
    time :math:`\\tau_p` (s).  Because :math:`\\kappa_p` belongs to the
    detector, a channel fitted with the white light's shapes fills at its own
    rate: the ramp's shape differs from channel to channel as the physics
    says, while each channel fits its own efficiencies
    (:mod:`lightledger.pipeline.grid`).

    The initial occupancies and orbit refills of Zhou et al. 2017 are left
    out: without bounds they are nearly degenerate with the efficiencies (a
    fit trades huge opposite amplitudes for a small gain in chi-square), and
    in a visit whose first orbit is left out the fast population has emptied
    during the gaps anyway.

    A band whose pixels receive different rates (a spectrum's columns) traps
    at each pixel's own rate, and the sum of such ramps is not the ramp of
    one mean rate: the fill constant :math:`c = \\kappa f + 1/\\tau` differs
    from pixel to pixel.  When the inputs hold the band's parts
    (covariates ``trap_rate.G`` and ``trap_share.G`` for G = 0, 1, ...: the
    rate per pixel of each part, e.g. each spectral channel, and its share of
    the band's electrons), the columns are the shares' sum of each part's
    columns at its own rate, with the detector's constants
    :math:`\\kappa_p, \\tau_p` and efficiencies shared by every part:

    .. math:: 1 - \\sum_p \\eta_p \\sum_g w_g(t)\\, G_p(f_g; \\kappa_p, \\tau_p),

    so that a channel fitted at the white light's shapes with its own rate
    is the same detector model.  Without them ``trap_rate`` is the one rate.

    The shape parameters are refined between their grid values (the grids
    are coarse, a factor of about 2 per value, and a fit held at a grid
    value loses chi-square that an information criterion then counts
    against the model), and :meth:`limits` keeps their grids' extensions
    to what the exposures can tell apart.

    Parameters
    ----------
    reference_rate : float
        Rate (electrons per second per pixel) at which ``fill`` is quoted,
        e.g. the white light curve's; > 0.
    populations : int
        1 (a fast population only) or 2 (fast and slow).
    fill_grids, release_grids : tuple of tuple of float
        Grids (seconds) per population.

    Notes
    -----
    Reads the covariates ``exposure_start`` (s), ``exposure_time`` (s) and
    ``trap_rate`` (e-/s/pixel, a smooth estimate of the light curve's
    incident rate), and ``orbit``.  Only ratios of rates matter to the fit
    (an overall scale of the rates is absorbed by :math:`\\kappa` and the
    amplitudes), so a rate per column instead of per pixel changes only the
    quoted fill times.  Derivatives: with respect to :math:`\\ln` fill,
    :math:`-\\partial/\\partial\\ln\\kappa`; with respect to :math:`\\ln\\tau`,
    as computed by :func:`~lightledger.pipeline.traps.trap_ramp_basis`.
    Cost per evaluation: one pass over the exposures for the efficiencies'
    columns; the derivatives (5 parameter sets in one pass) are made only when
    a design's derivatives are read.
    """

    reference_rate: float
    populations: int = 2
    fill_grids: tuple = DEFAULT_FILL_GRIDS
    release_grids: tuple = DEFAULT_RELEASE_GRIDS
    label: str = "trap"
    refine: bool = True

    def __post_init__(self):
        if not (np.isfinite(self.reference_rate) and self.reference_rate > 0):
            raise ParameterError(f"reference_rate must be a finite rate > 0 (electrons per second "
                                 f"per pixel); got {self.reference_rate!r}")
        if self.populations not in (1, 2):
            raise ParameterError(f"populations must be 1 or 2; got {self.populations!r}")
        if len(self.fill_grids) < self.populations or len(self.release_grids) < self.populations:
            raise ParameterError("fill_grids and release_grids need one grid per population")

    @cached_property             # validated once; the fits ask for it at every design
    def shapes(self):
        out = []
        for p in range(self.populations):
            out.append(ShapeParam(f"fill{p}", _positive_grid(self.fill_grids[p], f"fill{p} grid"),
                                  refine=self.refine))
            out.append(ShapeParam(f"release{p}",
                                  _positive_grid(self.release_grids[p], f"release{p} grid"),
                                  refine=self.refine))
        return tuple(out)

    def limits(self, inputs, mask=None):
        """The range of each shape parameter the exposures can tell apart, seconds.

        A population that fills within one exposure loses the same charge
        in every orbit's first exposure whatever its fill time, and one that
        fills over longer than the visit is a straight trend: fill times
        from the shortest exposure to the visit's span.  One that empties
        between two exposures loses the same share of every exposure, and
        one that never empties during the visit is a population that never
        empties: release times from the shortest interval between exposure
        starts to ten times the span.

        Returns
        -------
        dict
            ``{"LABEL.fillP": (shortest, longest), "LABEL.releaseP": ...}``
            for :func:`~lightledger.pipeline.shapesearch.search_shapes`;
            empty without the exposure times and starts.
        """
        start = inputs.covariates.get("exposure_start")
        texp = inputs.covariates.get("exposure_time")
        if start is None or texp is None:
            return {}
        keep = np.isfinite(start) & np.isfinite(texp) & (texp > 0)
        if mask is not None:
            keep &= ~np.asarray(mask, bool)
        if np.count_nonzero(keep) < 2:
            return {}
        t, x = np.asarray(start, float)[keep], np.asarray(texp, float)[keep]
        span = float(t.max() + x[np.argmax(t)] - t.min())
        step = np.diff(np.sort(t))
        step = float(step[step > 0].min()) if np.any(step > 0) else float(x.min())
        out = {}
        for p in range(self.populations):
            out[f"{self.label}.fill{p}"] = (float(x.min()), span)
            out[f"{self.label}.release{p}"] = (step, 10.0 * span)
        return out

    def block(self, inputs, shape):
        start = inputs.need("exposure_start", self.label)
        texp = inputs.need("exposure_time", self.label)
        rate = inputs.need("trap_rate", self.label)
        orbit = inputs.need("orbit", self.label)
        P = self.populations
        fill = np.array([float(shape[f"fill{p}"]) for p in range(P)])
        release = np.array([float(shape[f"release{p}"]) for p in range(P)])
        kappa = 1.0 / (fill * self.reference_rate)
        order = np.argsort(start, kind="stable")
        if np.any(order != np.arange(order.size)):
            raise ParameterError(f"{self.label}: exposure_start must be in time order")
        rates, shares = _band_parts(inputs, rate, self.label)
        basis = trap_ramp_basis(rates, start, texp, kappa, release, orbit=orbit,
                                efficiency_only=True, derivatives=False)
        w = shares[:, :, None]                 # (n_exposures, n_parts, 1)
        cols = np.sum(basis.columns * w, axis=1)
        names = tuple(f"{self.label}{p}" for p in range(P))

        def derivatives():                     # made only when a design's derivatives are read
            full = trap_ramp_basis(rates, start, texp, kappa, release, orbit=orbit,
                                   efficiency_only=True)
            derivs = []
            for p in range(P):
                derivs.append(-np.sum(full.derivatives[2 * p] * w, axis=1))      # d / d ln(fill)
                derivs.append(np.sum(full.derivatives[2 * p + 1] * w, axis=1))   # d / d ln(release)
            return tuple(derivs)

        return Block(cols, names, derivatives)


def trap_limits(model, inputs, mask=None):
    """The trap time scales' limits, and their release grids held within them.

    Each :class:`TrapRamp` of ``model`` gives the range of its fill and
    release times the exposures can tell apart (:meth:`TrapRamp.limits`),
    past which the grids are not extended.  Release-time grid values outside
    it are moved to its ends: a population that empties between two
    exposures is in equilibrium with the incident rate at every exposure,
    and since the event dims that rate, its column follows the event and its
    efficiency trades with the depth (another model, not a ramp).  Fill-time
    grids are kept: a population filling within one exposure still shapes
    that exposure by how far it fills.

    Parameters
    ----------
    model : SystematicsModel
    inputs : SystematicsInputs
    mask : array_like of bool, optional
        True where an exposure is not fitted.

    Returns
    -------
    (params, limits)
        ``model.shape_params()`` with the release grids held within their
        limits, and the limits (qualified names to (lowest, highest), seconds)
        for :func:`~lightledger.pipeline.shapesearch.search_shapes`.
    """
    limits = {}
    held = set()
    for comp in model.components:
        if isinstance(comp, TrapRamp):
            limits.update(comp.limits(inputs, mask))
            held |= {f"{comp.label}.release{p}" for p in range(comp.populations)}
    params = []
    for name, sp in model.shape_params():
        if name in limits and name in held:
            low, high = limits[name]
            grid = np.unique(np.clip(np.asarray(sp.grid, float), low, high))
            sp = replace(sp, grid=tuple(float(x) for x in grid))
        params.append((name, sp))
    return tuple(params), limits


def _band_parts(inputs, rate, label):
    """Rates per pixel (n_exposures, n_parts) and shares of the band's parts, or the one rate.

    The parts are the covariates ``trap_rate.0``, ``trap_rate.1``, ... with
    ``trap_share.0``, ... (shares normalised to sum to 1 at each exposure).
    """
    cov = inputs.covariates
    n_parts = 0
    while f"trap_rate.{n_parts}" in cov:
        n_parts += 1
    if n_parts == 0:
        r = np.asarray(rate, float)
        return r[:, None], np.ones((r.size, 1))
    rates = np.stack([np.asarray(cov[f"trap_rate.{g}"], float) for g in range(n_parts)], axis=1)
    try:
        shares = np.stack([np.asarray(cov[f"trap_share.{g}"], float) for g in range(n_parts)],
                          axis=1)
    except KeyError:
        raise ParameterError(f"{label}: each trap_rate.G needs its trap_share.G (the part's "
                             f"share of the band's electrons)") from None
    if not (np.all(np.isfinite(shares)) and np.all(shares >= 0)):
        raise ParameterError(f"{label}: trap_share.G must be finite shares >= 0")
    total = shares.sum(axis=1, keepdims=True)
    if np.any(total <= 0):
        raise ParameterError(f"{label}: the trap_share.G of an exposure sum to 0")
    return rates, shares / total


@dataclass(frozen=True)
class Decorrelation:
    """Linear decorrelation against named covariates; one column per covariate.

    Each covariate (``dx``, ``dy``, ``width``, ``background`` or any other
    per-exposure series in the inputs) enters standardised, :math:`(x -
    \\bar x)/s_x` over its finite values, so that amplitudes are comparable;
    a constant covariate gives a column of zeros, which the fits drop.
    Common practice (e.g. Deming et al. 2013, ApJ 774, 95, decorrelation
    against the spectrum's position and width).  Columns are named by the
    covariates.
    """

    covariates: tuple = ("dx", "dy")
    label: str = "decorr"
    shapes: tuple = ()

    def block(self, inputs, shape):
        cols = []
        for name in self.covariates:
            x = np.asarray(inputs.need(name, self.label), dtype=float)
            ok = np.isfinite(x)
            if not np.any(ok):
                raise ParameterError(f"covariate {name} has no finite value to decorrelate against")
            sd = np.std(x[ok])
            cols.append((x - np.mean(x[ok])) / sd if sd > 0 else np.where(ok, 0.0, np.nan))
        return Block(np.stack(cols, axis=1) if cols else np.zeros((inputs.n, 0)),
                     tuple(str(c) for c in self.covariates))
