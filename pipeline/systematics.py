"""The instrument's systematics model: basis columns and a declarative model.

A systematics model is a tuple of *components*.  Each component reads some
per-exposure inputs (:class:`SystematicsInputs`: times, orbit numbers, orbit
phase, scan direction, any named covariate) and returns columns of the design
matrix, with their names; a component may own nonlinear *shape parameters*
(a ramp's time scale) with the grid of values to try.  :class:`SystematicsModel`
stacks the components' columns into one design matrix, without the constant
column, which every fit adds itself (the star's flux, or a visit's flux level).

The model of the flux is then :math:`S_i = F_0 (1 + \\sum_k b_k X_{ik})` with
:math:`X` the design matrix, i.e. the systematics are additive terms in units
of the flux level, linear in their amplitudes for fixed shape parameters.
The fits that consume a model (:func:`lightledger.pipeline.detrend.fit_light_curve`
for one visit, and the joint fit of several visits sharing one planet) profile the chi-square over the shape
parameters (:func:`lightledger.pipeline.shapesearch.search_shapes`) and
carry their uncertainty into the covariance from the columns' derivatives.

Adding a component: write a frozen dataclass with a ``label`` (prefix of its
column names), a ``shapes`` tuple of :class:`ShapeParam` (empty for a linear
component) and a method ``block(inputs, shape)`` returning a :class:`Block`
(columns, names and, for each shape parameter, the derivative of the columns
with respect to it, or its logarithm when ``ShapeParam.log``).  Nothing else
needs to change.

Masks do not enter here: the columns are evaluated on every exposure and the
fits leave masked exposures out.  Times are days; columns are dimensionless.
Inputs are not modified.
"""

from dataclasses import dataclass, field

import numpy as np

from .errors import ParameterError

__all__ = ["SystematicsInputs", "ShapeParam", "Block", "SystematicsModel", "Design",
           "VisitPolynomial", "OrbitPolynomial", "OrbitRamp", "ScanOffset", "PhaseSinusoids",
           "polynomial_basis", "orbit_phase_basis", "ramp_basis", "scan_direction_basis",
           "standard_model", "DEFAULT_TAU_GRID"]

#: Default ramp time scales, days (1 to 60 minutes, log-spaced).
DEFAULT_TAU_GRID = np.geomspace(1.0, 60.0, 16) / 1440.0


def _vector(x, name, n=None):
    a = np.asarray(x, dtype=float)
    if a.ndim != 1 or (n is not None and a.size != n):
        want = f"({n},)" if n is not None else "1-D"
        raise ParameterError(f"{name} must have shape {want}; got {a.shape}")
    return a


def _order(order, name):
    k = int(order)
    if k < 0 or k != order:
        raise ParameterError(f"{name} must be an integer >= 0; got {order!r}")
    return k


def _scaled(t):
    t = np.asarray(t, dtype=float)
    lo, hi = np.nanmin(t), np.nanmax(t)
    half = 0.5 * (hi - lo)
    return (t - 0.5 * (hi + lo)) / (half if half > 0 else 1.0)


# --------------------------------------------------------------------------
# Basis builders (plain functions on arrays)
# --------------------------------------------------------------------------

def polynomial_basis(time, order):
    """Visit-long polynomial in time, without the constant.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        Days.
    order : int
        Highest power, >= 0 (0 gives no column).

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, order)
        ``x**k`` for k = 1..order with ``x`` the time mapped onto [-1, 1]
        over the visit (for conditioning).
    """
    t = _vector(time, "time")
    k = _order(order, "order")
    x = _scaled(t)
    return x[:, None] ** np.arange(1, k + 1)[None, :]


def orbit_phase_basis(orbit_time, order):
    """Polynomial in time since the orbit's start, shared by all orbits.

    Parameters
    ----------
    orbit_time : array_like of float, shape (n_exposures,)
        Days since the start of each exposure's orbit.
    order : int
        Highest power, >= 0.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, order)
        ``x**k``, k = 1..order, with ``x`` = orbit_time / max(orbit_time).

    References
    ----------
    Berta et al. 2012, ApJ 747, 35 (orbit-phase systematics).
    """
    t = _vector(orbit_time, "orbit_time")
    k = _order(order, "order")
    top = np.nanmax(t) if t.size else 1.0
    x = t / (top if top > 0 else 1.0)
    return x[:, None] ** np.arange(1, k + 1)[None, :]


def ramp_basis(orbit_time, orbit, tau):
    """Per-orbit exponential ramp, one column per orbit.

    The systematics ``a_0 + r_o exp(-t_orb / tau)`` in orbit ``o`` equal
    ``(a_0 + r_o) - r_o (1 - exp(-t_orb / tau))``: with the constant column in
    the fit, these columns span the ramp ``1 - exp(-t_orb / tau)`` with a
    free amplitude in each orbit.

    Parameters
    ----------
    orbit_time : array_like of float, shape (n_exposures,)
        Days since the start of the exposure's orbit.
    orbit : array_like of int, shape (n_exposures,)
        Orbit number of each exposure.
    tau : float
        Time scale, days, > 0.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, n_orbits)
        Column ``o`` is ``exp(-orbit_time / tau)`` in orbit ``o`` and 0
        elsewhere, for each distinct orbit number in increasing order.

    References
    ----------
    Kreidberg et al. 2014, Nature 505, 69; Zhou et al. 2017, AJ 153, 243.
    """
    t = _vector(orbit_time, "orbit_time")
    o = np.asarray(orbit)
    if o.shape != t.shape:
        raise ParameterError(f"orbit must have the shape of orbit_time {t.shape}; got {o.shape}")
    if not (np.isfinite(tau) and tau > 0):
        raise ParameterError(f"tau must be a finite time in days > 0; got {tau!r}")
    labels = np.unique(o)
    return np.exp(-t / tau)[:, None] * (o[:, None] == labels[None, :])


def scan_direction_basis(direction):
    """Offset between the two scan directions.

    Parameters
    ----------
    direction : array_like, shape (n_exposures,)
        Scan direction sign of each exposure (e.g. the sign of the scan
        speed): > 0 forward, <= 0 reverse.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, 1) or (n_exposures, 0)
        1 for forward exposures, 0 otherwise; no column when all exposures
        share one direction.
    """
    d = _vector(direction, "direction")
    fwd = (d > 0).astype(float)
    if np.all(fwd == fwd[0]) if fwd.size else True:
        return np.zeros((d.size, 0))
    return fwd[:, None]


# --------------------------------------------------------------------------
# The declarative model
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class SystematicsInputs:
    """Per-exposure inputs the components read; all of shape (n_exposures,).

    Attributes
    ----------
    time : ndarray of float
        Mid-exposure times, days (BJD_TDB).
    orbit : ndarray of int or None
        Orbit number (0 = first orbit of the visit).
    orbit_time : ndarray of float or None
        Days since the start of the exposure's orbit.
    scan_direction : ndarray of float or None
        +1 forward, -1 reverse, 0 staring.
    covariates : dict of str to ndarray of float
        Any other named covariate (``dx``, ``dy``, ``width``, ``background``,
        ...), for decorrelation components.
    """

    time: np.ndarray
    orbit: np.ndarray | None = None
    orbit_time: np.ndarray | None = None
    scan_direction: np.ndarray | None = None
    covariates: dict = field(default_factory=dict)

    def __post_init__(self):
        t = _vector(self.time, "time")
        object.__setattr__(self, "time", t)
        n = t.size
        if self.orbit is not None:
            o = np.asarray(self.orbit)
            if o.shape != (n,):
                raise ParameterError(f"orbit must have shape ({n},); got {o.shape}")
            object.__setattr__(self, "orbit", o)
        if self.orbit_time is not None:
            object.__setattr__(self, "orbit_time", _vector(self.orbit_time, "orbit_time", n))
        if self.scan_direction is not None:
            object.__setattr__(self, "scan_direction",
                               _vector(self.scan_direction, "scan_direction", n))
        cov = {str(k): _vector(v, k, n) for k, v in dict(self.covariates).items()}
        object.__setattr__(self, "covariates", cov)

    @property
    def n(self):
        """Number of exposures."""
        return self.time.size

    def need(self, name, who):
        """The input ``name`` (an attribute or a named covariate), or a clear error."""
        value = getattr(self, name, None) if name in ("orbit", "orbit_time", "scan_direction") \
            else self.covariates.get(name)
        if value is None:
            raise ParameterError(f"{name} is needed for the systematics component {who}")
        return value


@dataclass(frozen=True)
class ShapeParam:
    """A nonlinear shape parameter of a component.

    Attributes
    ----------
    name : str
        Name within its component (e.g. ``"tau"``); the model qualifies it as
        ``"LABEL.NAME"``.
    grid : tuple of float
        Values to try; the one of lowest chi-square is kept.
    refine : bool
        Refine the best grid value by a bounded one-dimensional minimisation
        between its grid neighbours.
    log : bool
        Search in the logarithm (for a positive scale); the component's
        derivatives are then with respect to the logarithm.
    """

    name: str
    grid: tuple
    refine: bool = False
    log: bool = True


@dataclass(frozen=True)
class Block:
    """Columns of one component.

    Attributes
    ----------
    columns : ndarray of float, shape (n_exposures, k)
    names : tuple of str, length k
    derivatives : tuple of ndarray, each of shape (n_exposures, k)
        One per shape parameter of the component, in its ``shapes`` order:
        the derivative of ``columns`` with respect to the parameter (its
        natural logarithm when ``ShapeParam.log``).
    """

    columns: np.ndarray
    names: tuple
    derivatives: tuple = ()


@dataclass(frozen=True)
class Design:
    """A systematics model evaluated on a visit; returned by :meth:`SystematicsModel.design`.

    Attributes
    ----------
    columns : ndarray of float, shape (n_exposures, n_columns)
        Design matrix without the constant column.
    names : tuple of str
    derivatives : ndarray of float, shape (n_shapes, n_exposures, n_columns)
        Derivative of ``columns`` with respect to each shape parameter (or its
        logarithm), zero in the columns of other components.
    shape_names : tuple of str
        Qualified shape-parameter names, ``"LABEL.NAME"``.
    """

    columns: np.ndarray
    names: tuple
    derivatives: np.ndarray
    shape_names: tuple


@dataclass(frozen=True)
class VisitPolynomial:
    """Visit-long polynomial in time (:func:`polynomial_basis`); columns ``visit^k``."""

    order: int = 1
    label: str = "visit"
    shapes: tuple = ()

    def block(self, inputs, shape):
        cols = polynomial_basis(inputs.time, self.order)
        return Block(cols, tuple(f"{self.label}^{j + 1}" for j in range(cols.shape[1])))


@dataclass(frozen=True)
class OrbitPolynomial:
    """Orbit-phase polynomial shared by all orbits (:func:`orbit_phase_basis`); ``orbit^k``."""

    order: int = 1
    label: str = "orbit"
    shapes: tuple = ()

    def block(self, inputs, shape):
        cols = orbit_phase_basis(inputs.need("orbit_time", self.label), self.order)
        return Block(cols, tuple(f"{self.label}^{j + 1}" for j in range(cols.shape[1])))


@dataclass(frozen=True)
class ScanOffset:
    """Offset of forward against reverse scans (:func:`scan_direction_basis`); ``scan``."""

    label: str = "scan"
    shapes: tuple = ()

    def block(self, inputs, shape):
        cols = scan_direction_basis(inputs.need("scan_direction", self.label))
        return Block(cols, (self.label,) * cols.shape[1])


@dataclass(frozen=True)
class PhaseSinusoids:
    """First-harmonic sinusoids of the orbital phase as systematics; ``cos1``, ``sin1``.

    Multiplying the systematics, not hidden by an eclipse: the ``systematic``
    phase-curve model of an eclipse visit.
    """

    t0: float
    period: float
    label: str = "phase"
    shapes: tuple = ()

    def block(self, inputs, shape):
        from .eventshapes import phase_curve_basis
        cols = phase_curve_basis(inputs.time, self.t0, self.period)
        return Block(cols, ("cos1", "sin1"))


@dataclass(frozen=True)
class OrbitRamp:
    """Per-orbit exponential ramp ``exp(-orbit_time / tau)`` (:func:`ramp_basis`).

    One column ``ramp[o]`` per orbit, free amplitudes, one time scale ``tau``
    (days) shared by the orbits and chosen from ``tau_grid`` (refined when
    ``fit_tau``).  The derivative with respect to ln tau is
    :math:`(t/\\tau) e^{-t/\\tau}`.
    """

    tau_grid: tuple = tuple(DEFAULT_TAU_GRID)
    fit_tau: bool = False
    label: str = "ramp"

    @property
    def shapes(self):
        grid = np.asarray(self.tau_grid, dtype=float).ravel()
        if grid.size < 1 or not np.all(np.isfinite(grid) & (grid > 0)):
            raise ParameterError("tau_grid must be finite time scales in days > 0")
        return (ShapeParam("tau", tuple(np.unique(grid)), refine=bool(self.fit_tau), log=True),)

    def block(self, inputs, shape):
        ot = inputs.need("orbit_time", self.label)
        orb = inputs.need("orbit", self.label)
        tau = shape["tau"]
        cols = ramp_basis(ot, orb, tau)
        names = tuple(f"{self.label}[{o}]" for o in np.unique(orb))
        return Block(cols, names, (cols * (ot / tau)[:, None],))


@dataclass(frozen=True)
class SystematicsModel:
    """A systematics model: an ordered tuple of components.

    Parameters
    ----------
    components : tuple
        Component objects (``label``, ``shapes``, ``block(inputs, shape)``),
        e.g. ``(VisitPolynomial(2), OrbitPolynomial(1), ScanOffset(), OrbitRamp())``.
        Column order follows the component order.

    Examples
    --------
    >>> model = SystematicsModel((VisitPolynomial(1), OrbitRamp(tau_grid=(0.004,))))
    >>> model.shape_params()
    (('ramp.tau', ShapeParam(name='tau', grid=(0.004,), refine=False, log=True)),)
    """

    components: tuple = ()

    def shape_params(self):
        """Qualified names and :class:`ShapeParam` of every shape parameter, in order."""
        out = []
        for comp in self.components:
            for sp in comp.shapes:
                out.append((f"{comp.label}.{sp.name}", sp))
        return tuple(out)

    def design(self, inputs, shapes=None):
        """Evaluate the model on a visit.

        Parameters
        ----------
        inputs : SystematicsInputs
        shapes : dict of str to float, optional
            Value of every shape parameter by qualified name; required when
            the model has any.

        Returns
        -------
        Design
        """
        shapes = {} if shapes is None else dict(shapes)
        n = inputs.n
        blocks, owners = [], []
        for comp in self.components:
            own = {sp.name: shapes.get(f"{comp.label}.{sp.name}") for sp in comp.shapes}
            missing = [k for k, v in own.items() if v is None]
            if missing:
                raise ParameterError(f"no value given for the shape parameter "
                                     f"{comp.label}.{missing[0]}")
            blk = comp.block(inputs, own)
            blocks.append(blk)
            owners.append(comp)
        cols = [b.columns for b in blocks]
        columns = np.concatenate(cols, axis=1) if cols else np.zeros((n, 0))
        names = tuple(nm for b in blocks for nm in b.names)
        shape_names = []
        derivs = []
        start = 0
        for comp, blk in zip(owners, blocks):
            k = blk.columns.shape[1]
            for sp, d in zip(comp.shapes, blk.derivatives):
                full = np.zeros_like(columns)
                full[:, start:start + k] = d
                derivs.append(full)
                shape_names.append(f"{comp.label}.{sp.name}")
            start += k
        D = np.stack(derivs) if derivs else np.zeros((0,) + columns.shape)
        return Design(columns, names, D, tuple(shape_names))


def standard_model(*, visit_order=1, orbit_order=0, scan_offset=False, phase_sinusoids=None,
                   ramp=False, tau_grid=None, fit_tau=False):
    """The usual low-Earth-orbit systematics model as a :class:`SystematicsModel`.

    Parameters
    ----------
    visit_order : int
        Visit-long polynomial order (0 = none besides the constant).
    orbit_order : int
        Orbit-phase polynomial order (0 = none).
    scan_offset : bool
        Offset between forward and reverse scans.
    phase_sinusoids : (float, float), optional
        ``(t0, period)`` in days: first-harmonic phase sinusoids as
        systematics columns.
    ramp : bool
        Per-orbit exponential ramps.
    tau_grid : array_like of float, optional
        Ramp time scales to try, days (default :data:`DEFAULT_TAU_GRID`).
    fit_tau : bool
        Refine the ramp time scale between grid values.

    Returns
    -------
    SystematicsModel
        Components in the order visit, orbit, scan, phase, ramp (the order of
        the columns).

    References
    ----------
    Berta et al. 2012, ApJ 747, 35; Kreidberg et al. 2014, Nature 505, 69.
    """
    comps = []
    if visit_order:
        comps.append(VisitPolynomial(_order(visit_order, "visit_order")))
    if orbit_order:
        comps.append(OrbitPolynomial(_order(orbit_order, "orbit_order")))
    if scan_offset:
        comps.append(ScanOffset())
    if phase_sinusoids is not None:
        t0, period = phase_sinusoids
        comps.append(PhaseSinusoids(float(t0), float(period)))
    if ramp:
        grid = DEFAULT_TAU_GRID if tau_grid is None else np.asarray(tau_grid, dtype=float).ravel()
        comps.append(OrbitRamp(tau_grid=tuple(float(x) for x in np.atleast_1d(grid)),
                               fit_tau=bool(fit_tau)))
    return SystematicsModel(tuple(comps))
