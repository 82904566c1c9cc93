"""The standard systematics components and :func:`standard_model`.

A visit-long polynomial, an orbit-phase polynomial, the scan-direction
offset, first-harmonic phase sinusoids and per-orbit exponential ramps, each a
component of a :class:`~lightledger.pipeline.sysmodel.SystematicsModel` built
on the basis columns of :mod:`lightledger.pipeline.sysbasis`.  More
components (visit exponential, tied ramps, charge trapping, decorrelation)
are in :mod:`lightledger.pipeline.components`.

Times are days; columns are dimensionless.  Inputs are not modified.
"""

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from .errors import ParameterError
from .sysbasis import (DEFAULT_TAU_GRID, _order, orbit_phase_basis, polynomial_basis,
                       ramp_basis, scan_direction_basis)
from .sysmodel import Block, ShapeParam, SystematicsModel

__all__ = ["VisitPolynomial", "OrbitPolynomial", "ScanOffset", "PhaseSinusoids", "OrbitRamp",
           "standard_model"]


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

    @cached_property             # validated once; the fits ask for it at every design
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
