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
with respect to it, or its logarithm when ``ShapeParam.log``; a component whose
derivatives cost more than its columns may give a callable returning them,
made only when a fit reads them, as the charge-trapping ramp does).  Nothing
else needs to change.

The code lives in three modules, re-exported here:
:mod:`~lightledger.pipeline.sysbasis` (the basis columns),
:mod:`~lightledger.pipeline.sysmodel` (inputs, shape parameters, blocks,
the model and its design matrix) and
:mod:`~lightledger.pipeline.syscomponents` (the standard components and
:func:`standard_model`).

Masks do not enter here: the columns are evaluated on every exposure and the
fits leave masked exposures out.  Times are days; columns are dimensionless.
Inputs are not modified.
"""

from .sysbasis import (DEFAULT_TAU_GRID, _order, _scaled, _vector, orbit_phase_basis,  # noqa: F401
                       polynomial_basis, ramp_basis, scan_direction_basis)
from .syscomponents import (OrbitPolynomial, OrbitRamp, PhaseSinusoids, ScanOffset,
                            VisitPolynomial, standard_model)
from .sysmodel import Block, Design, ShapeParam, SystematicsInputs, SystematicsModel

__all__ = ["SystematicsInputs", "ShapeParam", "Block", "SystematicsModel", "Design",
           "VisitPolynomial", "OrbitPolynomial", "OrbitRamp", "ScanOffset", "PhaseSinusoids",
           "polynomial_basis", "orbit_phase_basis", "ramp_basis", "scan_direction_basis",
           "standard_model", "DEFAULT_TAU_GRID"]
