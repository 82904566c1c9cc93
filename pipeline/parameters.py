"""Every stage parameter, declared once.

The reduction has four stages, run in this order:

``calibrate``
    raw ramps to calibrated frames (electrons, variance, data-quality bits);
``extract``
    calibrated frames to one spectrum per exposure on a common wavelength grid,
    with the drifts;
``bin``
    spectra to light curves in wavelength channels and a white band, with
    barycentric times and covariates;
``detrend``
    light curves divided by a fitted systematics model, with event depths.

Each stage's parameters are listed here with their default, type, allowed
values and meaning.  The visit description (``[stages.NAME]`` tables), the
command line (``--set NAME.KEY=VALUE``), the Luigi tasks and the product
headers all go through :func:`resolve`, so a parameter exists in exactly one
place.  A stage's ``version`` is part of the hash that names its products:
raise it whenever a change to the stage's code changes its numbers.
"""

import difflib
import math
from dataclasses import dataclass, field

from .errors import ParameterError

__all__ = ["Param", "StageSpec", "STAGES", "STAGE_ORDER", "resolve", "parse_assignment",
           "nearest"]


@dataclass(frozen=True)
class Param:
    """One stage parameter.

    Parameters
    ----------
    name : str
        Key in ``[stages.STAGE]`` and in ``--set STAGE.KEY=VALUE``.
    default : object
        Value used when the visit description does not set it.
    kind : {"float", "int", "bool", "str", "floats", "strs"}
        Type; ``"floats"`` is a list of numbers, ``"strs"`` a list of strings
        (on the command line: separated by commas).
    doc : str
        One line: meaning and unit.
    choices : tuple of str, optional
        Allowed values of a ``"str"`` parameter (of each item of ``"strs"``).
    minimum, maximum : float, optional
        Inclusive bounds of a number.
    length : int, optional
        Required length of a ``"floats"`` list.
    validate : callable, optional
        Called with each value (each item of a list) after the type checks;
        raises :class:`ParameterError` with a message naming what is wrong.
    """

    name: str
    default: object
    kind: str
    doc: str
    choices: tuple = ()
    minimum: float | None = None
    maximum: float | None = None
    length: int | None = None
    optional: bool = False
    validate: object = None

    def check(self, value, where):
        """Return ``value`` converted to this parameter's type, or raise.

        ``where`` names the file or option the value came from.
        """
        label = f"{where}: {self.name}"
        if value is None and self.optional:
            return None
        if self.kind == "bool":
            if isinstance(value, str) and value.lower() in ("true", "false"):
                return value.lower() == "true"
            if not isinstance(value, bool):
                raise ParameterError(f"{label} must be true or false, not {value!r}")
            return value
        if self.kind == "str":
            if not isinstance(value, str):
                raise ParameterError(f"{label} must be a string, not {value!r}")
            if self.choices and value not in self.choices:
                raise ParameterError(f"{label} must be one of {', '.join(self.choices)}; "
                                     f"got {value!r}{_suggest(value, self.choices)}")
            return value
        if self.kind in ("float", "int"):
            value = _number(value, self.kind, label)
            self._bounds(value, label)
            return value
        if self.kind == "strs":
            if isinstance(value, str):
                value = [v.strip() for v in value.split(",") if v.strip()]
            if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) for v in value):
                raise ParameterError(f"{label} must be a list of strings, not {value!r}")
            for v in value:
                if self.choices and v not in self.choices:
                    raise ParameterError(f"{label}: {v!r} is not one of {', '.join(self.choices)}"
                                         f"{_suggest(v, self.choices)}")
            if self.length is not None and len(value) != self.length:
                raise ParameterError(f"{label} must hold {self.length} strings, got {len(value)}")
            if self.validate is not None:
                for v in value:
                    try:
                        self.validate(v)
                    except ParameterError as exc:
                        raise ParameterError(f"{label}: {exc}") from None
            return tuple(value)
        if self.kind == "floats":
            if isinstance(value, str):
                text = value.strip().strip("[]")
                value = [v for v in text.replace(",", " ").split()] if text else []
            if not isinstance(value, (list, tuple)):
                raise ParameterError(f"{label} must be a list of numbers, not {value!r}")
            values = [_number(v, "float", label) for v in value]
            if self.length is not None and len(values) != self.length:
                raise ParameterError(f"{label} must hold {self.length} numbers, got {len(values)}")
            for v in values:
                self._bounds(v, label)
            return tuple(values)
        raise AssertionError(self.kind)

    def _bounds(self, value, label):
        if self.minimum is not None and value < self.minimum:
            raise ParameterError(f"{label} must be >= {self.minimum}, got {value}")
        if self.maximum is not None and value > self.maximum:
            raise ParameterError(f"{label} must be <= {self.maximum}, got {value}")


def _number(value, kind, label):
    if isinstance(value, bool):
        raise ParameterError(f"{label} must be a number, not {value!r}")
    if isinstance(value, str):
        try:
            value = float(value)
        except ValueError:
            raise ParameterError(f"{label} must be a number, not {value!r}") from None
    if not isinstance(value, (int, float)):
        raise ParameterError(f"{label} must be a number, not {value!r}")
    if isinstance(value, int):
        if kind == "int":
            return int(value)
        try:
            return float(value)
        except OverflowError:
            raise ParameterError(f"{label} must be a finite number, not {value!r}") from None
    if not math.isfinite(value):
        raise ParameterError(f"{label} must be a finite number, not {value!r}")
    if kind == "int":
        if value != int(value):
            raise ParameterError(f"{label} must be a whole number, not {value!r}")
        return int(value)
    return float(value)


@dataclass(frozen=True)
class StageSpec:
    """The declared parameters and code version of one stage."""

    name: str
    version: str
    doc: str
    params: tuple = field(default_factory=tuple)

    def param(self, key, where):
        for p in self.params:
            if p.name == key:
                return p
        names = [p.name for p in self.params]
        raise ParameterError(f"{where}: unknown key {self.name}.{key}"
                             f"{_suggest(key, names)}")

    def defaults(self):
        return {p.name: p.default for p in self.params}


def _suggest(word, candidates):
    match = nearest(word, candidates)
    return f" (did you mean {match!r}?)" if match else ""


def nearest(word, candidates):
    """The closest of ``candidates`` to ``word``, or None when none is close."""
    found = difflib.get_close_matches(str(word), list(candidates), n=1, cutoff=0.5)
    return found[0] if found else None


#: Parameters of the full-orbit event model (phase-curve visits and programmes).
_PHASE_CURVE = (
    Param("harmonics", 1, "int", "harmonics of the planet's flux in orbital angle "
          "(phase-curve events and programmes)", minimum=1, maximum=2),
    Param("fit_radius", True, "bool", "fit the radius ratio through the limb-darkened transit "
          "when a transit is in the data (phase-curve events and programmes)"),
    Param("phase_bins", tuple(round(0.1 * k, 1) for k in range(11)), "floats",
          "orbital-phase bin edges (cycles from mid-transit, within [0, 1]) of the "
          "phase-resolved spectrum", minimum=0.0, maximum=1.0),
)


def _check_model(text):
    from .modelspec import parse_model
    parse_model(text)


STAGES = {
    "calibrate": StageSpec("calibrate", "6", "raw ramps to calibrated frames", (
        Param("ramp_method", "fit", "str",
              "staring ramps: 'fit' = weighted up-the-ramp slope, 'diff' = sum of read differences",
              choices=("fit", "diff")),
        Param("break_threshold", 6.0, "float",
              "a read difference above this many sigma of the pixel's own difference scatter is "
              "a cosmic-ray ramp break and is left out", minimum=3.0),
        Param("background_method", "rowcol", "str",
              "sky model: 'rowcol' = per-column model from rows away from the source, "
              "'2d' = photutils Background2D with a segmentation source mask, "
              "'constant' = one clipped level, 'none'",
              choices=("rowcol", "2d", "constant", "none")),
        Param("destripe", "auto", "str",
              "1/f read-noise removal: 'differences' per read difference, 'frame' per frame, "
              "'off', or 'auto' (per difference for staring exposures, off for scans)",
              choices=("auto", "differences", "frame", "off")),
        Param("band_padding", 3, "int",
              "rows added on each side of the band a scan crossed in each read difference",
              minimum=0, maximum=50),
        Param("chunk_size", 0, "int",
              "exposures per calibration and extraction product (one Luigi task each); "
              "0 = a quarter of the visit, at least 16 and at most 64", minimum=0),
    )),
    "extract": StageSpec("extract", "4", "calibrated frames to aligned spectra", (
        Param("method", "optimal", "str", "'optimal' (Horne 1986) or 'box'",
              choices=("optimal", "box")),
        Param("aperture_padding", 6.0, "float",
              "rows kept beyond the trace's half-width (stare) or the scanned band (scan)",
              minimum=0.0),
        Param("clip_threshold", 5.0, "float",
              "optimal extraction: reject pixels deviating by more than this many sigma from the profile fit",
              minimum=2.0),
        Param("profile_order", 3, "int",
              "order of the polynomial that smooths the spatial profile along the dispersion",
              minimum=0, maximum=10),
        Param("follow_tilt", False, "bool",
              "optimal extraction: model the spatial profile along the fitted trace as well as "
              "along detector rows (for strongly tilted traces; about 8 times slower)"),
        Param("refine_wavelength", True, "bool",
              "refine the dispersion zero point by cross-correlation with the model spectrum"),
        Param("align", True, "bool",
              "resample each spectrum onto the reference grid with its own measured shift"),
    )),
    "bin": StageSpec("bin", "7", "spectra to channel light curves", (
        Param("edges", (), "floats", "channel edges in micrometres (takes precedence when given)",
              minimum=0.0),
        Param("width", 0.0, "float",
              "uniform channel width in micrometres over the lit part of the spectrum (used when "
              "edges is empty)", minimum=0.0),
        Param("n_channels", 10, "int",
              "number of channels over the lit part of the spectrum when neither edges nor width "
              "is given", minimum=1),
        Param("equal_counts", False, "bool",
              "with n_channels: make the channels hold equal numbers of photons"),
        Param("lit_threshold", 0.05, "float",
              "a pixel is lit where the median spectrum (5-pixel running median) reaches this "
              "fraction of its peak; channels from n_channels or width span the lit pixels only, "
              "and a channel whose mean light is below this fraction is flagged dim (0 = the "
              "whole spectrum)", minimum=0.0, maximum=0.99),
        Param("white_range", (), "floats", "white band [lo, hi] in micrometres; empty = all channels",
              minimum=0.0),
        Param("fill", "profile", "str",
              "masked pixels: 'profile' = fill from the scaled median spectrum, 'flag' = flag the channel-exposure",
              choices=("profile", "flag")),
        Param("orbit_gap_minutes", 0.0, "float",
              "scan visits: a start-to-start interval longer than this many minutes begins a new "
              "orbit; 0 = found from the intervals (the break between the cadence and the "
              "occultation gaps, with a warning when it is ambiguous)", minimum=0.0),
    )),
    "detrend": StageSpec("detrend", "20", "light curves divided by a systematics model", (
        Param("models", (), "strs",
              "systematics models to fit, rank and marginalise over, each tokens joined by '+': "
              "visit0|visit1|visit2|visitexp, orbit0..orbit4, scan, ramp|ramp-first|ramp-shared, "
              "traps|traps1, dx, dy, width, background, cm-sys|cm-res (e.g. "
              "visit1+orbit2+scan+ramp); empty = the default grid for scans or for stares",
              validate=_check_model),
        Param("criterion", "bic", "str",
              "information criterion that ranks and weights the models: 'bic' (Schwarz) or "
              "'aic' (Akaike)", choices=("bic", "aic")),
        Param("depth_errors", "covariance", "str",
              "depth error each model contributes and the product carries: 'covariance' (scaled "
              "by the root of the reduced chi-square above 1), 'beta' (times the time-averaging "
              "beta factor above 1), 'permutation' (cyclic shifts of the residuals), 'largest'",
              choices=("covariance", "beta", "permutation", "largest")),
        Param("permutation_shifts", 100, "int",
              "cyclic shifts of the residuals for the permutation errors (0 = not computed)",
              minimum=0),
        Param("white_free", ("t0",), "strs",
              "event parameters fitted to the white light curve (a priori values as the start) "
              "and given to the channels: any of t0, a_rs, inclination; empty = the ephemeris",
              choices=("t0", "a_rs", "inclination")),
        Param("limb_darkening", "visit", "str",
              "channels' limb darkening: 'visit' = the event's u1, u2 for every channel; 'table' = "
              "the event's ld_wavelength, ld_u1, ld_u2 at each channel's centre; 'fit' = fitted "
              "per channel with the white light's pair as a Gaussian prior",
              choices=("visit", "table", "fit")),
        Param("limb_darkening_prior", 0.1, "float",
              "standard deviation of the prior on each channel's u1 and u2 (limb_darkening = fit)",
              minimum=0.001),
        Param("drop_first_orbit", True, "bool", "leave the first orbit of a multi-orbit visit out of the fit"),
        Param("fit", "joint", "str",
              "'joint' = systematics and event depth together; 'outside' = systematics from "
              "out-of-event exposures only, then the depth", choices=("joint", "outside")),
        Param("phase_curve", "auto", "str",
              "sinusoidal phase-curve terms at the orbital period: 'on', 'off', or 'auto' (on for "
              "an eclipse visit longer than a tenth of the period)", choices=("auto", "on", "off")),
        Param("phase_curve_model", "planet", "str",
              "eclipse phase curve in a joint fit: 'planet' = the planet's flux (constant + "
              "sinusoids) hidden by the eclipse, depth at mid-eclipse; 'systematic' = independent "
              "sinusoids multiplying the systematics", choices=("planet", "systematic")),
    ) + _PHASE_CURVE),
    "joint": StageSpec("joint", "7", "the visits of a programme fitted together: each its own "
                       "systematics, one planet per channel, over a grid of systematics models",
                       (Param("models", (), "strs",
                              "systematics models of the joint fit's grid, each fitted to every "
                              "visit (tokens as detrend.models; common-mode tokens are not "
                              "fitted jointly); empty = the default phase-curve grid of the "
                              "visits' kind (a programme of scans and stares pairs the k-th "
                              "model of each)", validate=_check_model),
                        Param("criterion", "bic", "str",
                              "information criterion that ranks and weights the joint fit's "
                              "models: 'bic' (Schwarz) or 'aic' (Akaike)",
                              choices=("bic", "aic")))
                       + _PHASE_CURVE),
}

#: Stages in the order the reduction runs them.
STAGE_ORDER = ("calibrate", "extract", "bin", "detrend")


def resolve(stage, overrides=None, where="parameters"):
    """Defaults of ``stage`` updated with validated ``overrides``.

    Parameters
    ----------
    stage : str
        One of :data:`STAGE_ORDER`.
    overrides : dict, optional
        Key to value; each key must be declared for the stage.
    where : str
        Names the source of the overrides in error messages (a file name or
        ``--set``).

    Returns
    -------
    params : dict
        Every parameter of the stage, with converted values.

    Raises
    ------
    ParameterError
        For an unknown stage or key (naming the nearest valid one) or a value
        of the wrong type or out of bounds.
    """
    if stage not in STAGES:
        raise ParameterError(f"{where}: unknown stage {stage!r}{_suggest(stage, STAGES)}; "
                             f"stages are {', '.join(STAGE_ORDER)}")
    spec = STAGES[stage]
    params = spec.defaults()
    for key, value in (overrides or {}).items():
        params[key] = spec.param(key, where).check(value, f"{where}: {stage}")
    return params


def parse_assignment(text):
    """Split ``"STAGE.KEY=VALUE"`` into ``(stage, key, value)``, checked.

    The value is converted to the parameter's type.
    """
    where = f"--set {text}"
    if "=" not in text or "." not in text.split("=", 1)[0]:
        raise ParameterError(f"{where}: expected STAGE.KEY=VALUE, e.g. extract.clip_threshold=4")
    lhs, value = text.split("=", 1)
    stage, key = lhs.strip().split(".", 1)
    if stage not in STAGES:
        raise ParameterError(f"{where}: unknown stage {stage!r}{_suggest(stage, STAGES)}")
    param = STAGES[stage].param(key.strip(), where)
    return stage, param.name, param.check(value.strip(), where)
