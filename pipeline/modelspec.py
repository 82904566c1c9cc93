"""Systematics models described by short strings, and the default grids.

A model is written as tokens joined by ``+``, in any order, e.g.
``"visit1+orbit2+scan+ramp"``:

=================  ==============================================================
token              component
=================  ==============================================================
``visit0``         the constant alone (the default when no visit token is given)
``visit1``         visit-long polynomial of order 1 (``visit2``: order 2)
``visitexp``       visit-long exponential in time
``orbit1``         orbit-phase polynomial of order 1 (to ``orbit4``; ``orbit0``: none)
``scan``           offset between forward and reverse scans
``ramp``           per-orbit exponential ramps, a free amplitude per orbit
``ramp-first``     exponential ramps: the first orbit's own amplitude, one for the rest
``ramp-shared``    exponential ramps: one amplitude for every orbit
``traps``          charge-trapping ramp, two trap populations (``traps1``: one)
``dx`` ``dy``      linear decorrelation against the spectral and spatial drifts
``width``          ... against the trace width or scanned band length
``background``     ... against the sky background
``cm-sys``         channels only: divide by the white light's systematics first
``cm-res``         channels only: divide by the white light's flux over its event model first
=================  ==============================================================

The common-mode tokens change only how the channels are fitted (the
white-light curve's fitted systematics, or its whole deviation from the
event model, systematics and residuals together ("divide-white"), divided
out of each channel before its own fit: Berta et al. 2012, ApJ 747, 35;
Kreidberg et al. 2014, Nature 505, 69; :mod:`.commonmode`); the white light
curve itself is fitted with the rest of the model.

:func:`parse_model` checks a string and returns a :class:`ModelSpec`;
:meth:`ModelSpec.systematics` builds the
:class:`~lightledger.pipeline.systematics.SystematicsModel`.
:data:`DEFAULT_SCAN_GRID` and :data:`DEFAULT_STARE_GRID` are the grids tried
when none is given.
"""

from dataclasses import dataclass

from .components import Decorrelation, TiedOrbitRamp, TrapRamp, VisitExponential
from .errors import ParameterError
from .systematics import (DEFAULT_TAU_GRID, OrbitPolynomial, OrbitRamp, ScanOffset,
                          SystematicsModel, VisitPolynomial)

__all__ = ["ModelSpec", "parse_model", "parse_grid", "COVARIATES", "TOKENS",
           "DEFAULT_SCAN_GRID", "DEFAULT_STARE_GRID", "DEFAULT_PHASE_SCAN_GRID",
           "DEFAULT_PHASE_STARE_GRID"]

#: Covariates a model may decorrelate against (columns of the light-curve product).
COVARIATES = ("dx", "dy", "width", "background")

#: Every token :func:`parse_model` accepts.
TOKENS = (("visit0", "visit1", "visit2", "visitexp")
          + tuple(f"orbit{k}" for k in range(5))
          + ("scan", "ramp", "ramp-first", "ramp-shared", "traps", "traps1")
          + COVARIATES + ("cm-sys", "cm-res"))

#: Default grid for a visit of low-Earth orbits with spatial scans (the first
#: orbit usually left out): today's usual models (visit slope, orbit-phase
#: polynomial, per-orbit exponential ramps, scan offset; Kreidberg et al.
#: 2014, Wakeford et al. 2016) with their common variations, the physical
#: charge-trapping ramp (Zhou et al. 2017), decorrelation against the drifts
#: and common-mode corrections for the channels.
DEFAULT_SCAN_GRID = (
    "visit1+scan+ramp",
    "visit1+orbit1+scan+ramp",
    "visit1+orbit2+scan+ramp",
    "visit2+orbit2+scan+ramp",
    "visitexp+orbit2+scan+ramp",
    "visit1+orbit2+scan+ramp-shared",
    "visit1+orbit3+scan",
    "visit1+orbit4+scan",
    "visit1+scan+traps",
    "visit1+orbit1+scan+traps",
    "visit1+orbit2+scan+ramp+dx+dy",
    "visit1+orbit2+scan+ramp+width+background",
    "visit1+scan+cm-sys",
    "visit1+scan+cm-res",
)

#: Default grid for a continuous stare: visit-long trends with and without the
#: settling ramp at the start, decorrelation, common mode.
DEFAULT_STARE_GRID = (
    "visit1",
    "visit2",
    "visitexp",
    "visit1+ramp",
    "visit2+ramp",
    "visit1+ramp+dx+dy",
    "visit1+ramp+width+background",
    "visit1+cm-sys",
    "visit1+cm-res",
)

#: Default grid for a phase curve of low-Earth orbits with spatial scans: the
#: planet's flux varies over the whole visit, so only a visit-long slope (or
#: curvature) is tried beside the orbit-phase polynomial, the ramp variants and
#: the charge-trapping ramp.  The visit-long curvature comes with per-orbit and
#: with shared ramp amplitudes: on a visit of many orbits the per-orbit ramps
#: cost a parameter per orbit, and without a curved member of the shared ramp
#: the criterion takes the straight one and the phase curve absorbs the
#: curvature.  Every model is fitted to every light curve with its own shapes
#: (a joint fit ties nothing to the white light), so the grid is kept short.
DEFAULT_PHASE_SCAN_GRID = (
    "visit1+orbit2+scan+ramp",
    "visit1+orbit1+scan+ramp",
    "visit2+orbit2+scan+ramp",
    "visit1+orbit2+scan+ramp-shared",
    "visit2+orbit2+scan+ramp-shared",
    "visit1+orbit1+scan+traps",
)

#: Default grid for a phase curve observed in one continuous stare.
DEFAULT_PHASE_STARE_GRID = (
    "visit1+ramp",
    "visit2+ramp",
    "visit1+ramp+dx+dy",
)


@dataclass(frozen=True)
class ModelSpec:
    """A parsed model string; returned by :func:`parse_model`.

    Attributes
    ----------
    name : str
        Canonical string (tokens in a fixed order).
    visit : str
        "visit0", "visit1", "visit2" or "visitexp".
    orbit_order : int
        0 to 4.
    scan : bool
    ramp : str
        "", "each", "first" or "shared".
    traps : int
        Trap populations, 0 to 2.
    covariates : tuple of str
        Decorrelation covariates.
    common_mode : str
        "", "sys" or "res".
    """

    name: str
    visit: str = "visit0"
    orbit_order: int = 0
    scan: bool = False
    ramp: str = ""
    traps: int = 0
    covariates: tuple = ()
    common_mode: str = ""

    @property
    def white_name(self):
        """The model without its common-mode token: what the white light curve is fitted with."""
        return _canonical(self.visit, self.orbit_order, self.scan, self.ramp, self.traps,
                          self.covariates, "")

    @property
    def families(self):
        """Kinds of systematics the model contains (for reports): e.g. {"exponential ramp"}."""
        out = set()
        if self.ramp:
            out.add("exponential ramp")
        if self.traps:
            out.add("charge trapping")
        if self.covariates:
            out.add("decorrelation")
        if self.common_mode:
            out.add("common mode")
        return out

    def systematics(self, *, tau_grid=None, reference_rate=None, stare=False):
        """The :class:`~lightledger.pipeline.systematics.SystematicsModel` of this spec.

        Parameters
        ----------
        tau_grid : array_like of float, optional
            Ramp time scales to try, days (default
            :data:`~lightledger.pipeline.systematics.DEFAULT_TAU_GRID`).
        reference_rate : float, optional
            Rate at which trap fill times are quoted (e-/s/pixel); required
            for ``traps``.
        stare : bool, optional
            A continuous stare: the orbit-phase polynomial and scan offset are
            left out (a stare is one orbit, scanned in no direction).

        Returns
        -------
        SystematicsModel
        """
        grid = tuple(float(x) for x in (DEFAULT_TAU_GRID if tau_grid is None else tau_grid))
        comps = []
        if self.visit in ("visit1", "visit2"):
            comps.append(VisitPolynomial(int(self.visit[-1])))
        elif self.visit == "visitexp":
            comps.append(VisitExponential())
        if self.orbit_order and not stare:
            comps.append(OrbitPolynomial(self.orbit_order))
        if self.scan and not stare:
            comps.append(ScanOffset())
        if self.ramp == "each":
            comps.append(OrbitRamp(tau_grid=grid))
        elif self.ramp in ("first", "shared"):
            comps.append(TiedOrbitRamp(amplitudes=self.ramp, tau_grid=grid))
        if self.traps:
            if reference_rate is None:
                raise ParameterError(f"model {self.name}: the charge-trapping ramp needs the "
                                     f"reference rate (electrons per second per pixel)")
            comps.append(TrapRamp(reference_rate=float(reference_rate), populations=self.traps))
        if self.covariates:
            comps.append(Decorrelation(covariates=self.covariates))
        return SystematicsModel(tuple(comps))


def _canonical(visit, orbit_order, scan, ramp, traps, covariates, common_mode):
    parts = []
    if common_mode:
        parts.append(f"cm-{common_mode}")
    parts.append(visit)
    if orbit_order:
        parts.append(f"orbit{orbit_order}")
    if scan:
        parts.append("scan")
    if ramp:
        parts.append({"each": "ramp", "first": "ramp-first", "shared": "ramp-shared"}[ramp])
    if traps:
        parts.append("traps" if traps == 2 else "traps1")
    parts.extend(c for c in COVARIATES if c in covariates)
    return "+".join(parts)


def parse_model(text):
    """Check a model string and return its :class:`ModelSpec`.

    Parameters
    ----------
    text : str
        Tokens joined by ``+`` (see the module docstring); spaces and case
        are ignored.

    Returns
    -------
    ModelSpec

    Raises
    ------
    ParameterError
        For an unknown or repeated token, or two tokens of one kind (two
        visit trends, two orbit polynomials, two ramp kinds, two common
        modes); the message names the token and the allowed ones.
    """
    if not isinstance(text, str) or not text.strip():
        raise ParameterError(f"a systematics model must be a non-empty string of tokens joined "
                             f"by '+', e.g. 'visit1+orbit2+scan+ramp'; got {text!r}")
    tokens = [t.strip().lower() for t in text.replace(" ", "").split("+")]
    seen = set()
    visit, orbit, scan, ramp, traps, cm = None, None, False, None, 0, None
    covs = []
    for tok in tokens:
        if tok not in TOKENS:
            from .parameters import nearest
            hint = nearest(tok, TOKENS)
            hint = f" (did you mean {hint!r}?)" if hint else ""
            raise ParameterError(f"model {text!r}: unknown token {tok!r}{hint}; tokens are "
                                 f"{', '.join(TOKENS)}")
        if tok in seen:
            raise ParameterError(f"model {text!r}: token {tok!r} given twice")
        seen.add(tok)

        def once(current, kind):
            if current is not None:
                raise ParameterError(f"model {text!r}: two {kind} tokens ({current!r} and {tok!r})")

        if tok.startswith("visit"):
            once(visit, "visit-trend")
            visit = tok
        elif tok.startswith("orbit"):
            once(orbit, "orbit-polynomial")
            orbit = int(tok[-1])
        elif tok == "scan":
            scan = True
        elif tok.startswith("ramp"):
            once(ramp, "ramp")
            ramp = {"ramp": "each", "ramp-first": "first", "ramp-shared": "shared"}[tok]
        elif tok.startswith("traps"):
            if traps:
                raise ParameterError(f"model {text!r}: two charge-trapping tokens")
            traps = 1 if tok == "traps1" else 2
        elif tok.startswith("cm-"):
            once(cm, "common-mode")
            cm = tok[3:]
        else:
            covs.append(tok)
    visit = visit or "visit0"
    covariates = tuple(c for c in COVARIATES if c in covs)
    name = _canonical(visit, orbit or 0, scan, ramp or "", traps, covariates, cm or "")
    return ModelSpec(name=name, visit=visit, orbit_order=orbit or 0, scan=scan, ramp=ramp or "",
                     traps=traps, covariates=covariates, common_mode=cm or "")


def parse_grid(texts):
    """Parse a list of model strings; repeated models (same canonical name) are an error.

    Returns
    -------
    tuple of ModelSpec
    """
    specs = tuple(parse_model(t) for t in texts)
    names = [s.name for s in specs]
    for k, nm in enumerate(names):
        if nm in names[:k]:
            raise ParameterError(f"model grid: {texts[k]!r} repeats the model {nm!r}")
    if not specs:
        raise ParameterError("model grid: give at least one model")
    return specs
