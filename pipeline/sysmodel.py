"""The declarative systematics model: inputs, shape parameters, blocks and the design matrix.

:class:`SystematicsModel` is an ordered tuple of components; each reads the
per-exposure :class:`SystematicsInputs` and returns a :class:`Block` of
columns (with their derivatives for each of its nonlinear
:class:`ShapeParam`); :meth:`SystematicsModel.design` stacks them into a
:class:`Design`.  The components themselves live in
:mod:`lightledger.pipeline.syscomponents` and
:mod:`lightledger.pipeline.components`; see
:mod:`lightledger.pipeline.systematics` for how to add one.

Times are days; columns are dimensionless.  Inputs are not modified.
"""

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from .errors import ParameterError
from .sysbasis import _vector

__all__ = ["SystematicsInputs", "ShapeParam", "Block", "Design", "SystematicsModel"]


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
        natural logarithm when ``ShapeParam.log``).  A component whose
        derivatives cost more than its columns may give the constructor a
        callable of no argument returning that tuple (one per shape
        parameter) instead: it is called when ``derivatives`` or the design's
        ``derivatives`` are first read, which a shape search, comparing
        chi-squares, never does.
    """

    columns: np.ndarray
    names: tuple
    _derivatives: object = ()

    @cached_property
    def derivatives(self):
        d = self._derivatives
        return tuple(d()) if callable(d) else d

    @property
    def n_derivatives(self):
        """Number of derivatives, without making deferred ones."""
        return None if callable(self._derivatives) else len(self._derivatives)

    def __reduce__(self):               # pickled with its derivatives made
        return (Block, (self.columns, self.names, self.derivatives))


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
        logarithm), zero in the columns of other components; made when first
        read (the design is constructed with the array or a callable
        returning it).
    shape_names : tuple of str
        Qualified shape-parameter names, ``"LABEL.NAME"``.
    """

    columns: np.ndarray
    names: tuple
    _derivatives: object
    shape_names: tuple

    @cached_property
    def derivatives(self):
        d = self._derivatives
        return d() if callable(d) else d

    def __reduce__(self):               # pickled with its derivatives made
        return (Design, (self.columns, self.names, self.derivatives, self.shape_names))


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
        for comp, blk in zip(owners, blocks):
            n_derivs = len(comp.shapes) if blk.n_derivatives is None else blk.n_derivatives
            shape_names.extend(f"{comp.label}.{sp.name}" for sp in comp.shapes[:n_derivs])

        def stacked():
            derivs = []
            start = 0
            for comp, blk in zip(owners, blocks):
                k = blk.columns.shape[1]
                for sp, d in zip(comp.shapes, blk.derivatives):
                    full = np.zeros_like(columns)
                    full[:, start:start + k] = d
                    derivs.append(full)
                start += k
            return np.stack(derivs) if derivs else np.zeros((0,) + columns.shape)

        # the derivatives are stacked (and made, for a component that defers
        # them) only when read: a shape search compares chi-squares alone
        return Design(columns, names, stacked, tuple(shape_names))

