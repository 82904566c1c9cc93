"""A grid of systematics models: every model fitted, ranked, and the depths marginalised.

For each model of the grid (:mod:`lightledger.pipeline.modelspec`) the white
light curve is fitted first with the event's mid-time (optionally a/Rs and
inclination) and the systematics' shape parameters free
(:func:`lightledger.pipeline.whitelight.fit_white`); every channel is then
fitted with that model at the white light's event and shapes, only its
linear terms and depth free.  A model with a common-mode token divides each
channel first by the top-ranked white model's systematics (``cm-sys``) or by
the white flux over its event model, the systematics as measured (``cm-res``,
"divide-white"; Berta et al. 2012; Kreidberg et al. 2014), with the variance
of a ratio of correlated fluxes (:mod:`lightledger.pipeline.commonmode`).

Each light curve (the white one and each channel) ranks the models by BIC
or AIC, weights them by :math:`e^{-\\mathrm{IC}/2}` normalised, and
marginalises its depth with an error that includes the spread between models
(Gibson 2014; Wakeford et al. 2016; :mod:`lightledger.pipeline.selection`).
The white light ranks only its distinct models (models differing by their
common mode share one white fit).  A channel's weights take the white
light's weights as the models' prior (a common-mode member that of the
top white model it divides out; its depth is the mean over the white
models' common modes weighted like the white light's, their spread added to
its error): the channels are fitted at the white light's
systematics, and a channel alone, with a tenth of the signal, cannot tell a
ramp the white light shows, so that by its own criterion alone a model
without the ramp would win on its fewer parameters and bias every channel
the same way.  Every fit's depth error comes three ways
(:mod:`lightledger.pipeline.fiterrors`); ``error_kind`` chooses the one
marginalised.

:func:`rank_fits` and :func:`marginalise_fits` are the generic pieces for any
other fit that tries several systematics models (e.g. a joint fit of several
visits): give them the chi-square, parameter count and point count of each
fit and any parameter with its error.

Exposures where any model's columns are not finite (a covariate missing) are
left out of every model's fit, so that all criteria compare fits to the same
points.  Masks: True = bad.  Inputs are not modified.
"""

from dataclasses import dataclass, replace

import numpy as np

from .commonmode import common_modes
from .errors import AllMaskedError, ParameterError
from .fiterrors import ERROR_KINDS
from .gridfits import ChannelJob, WhiteJob, fit_channels_job, fit_white_job
from .inherited import inherited_error
from .limbfit import fit_limb_darkening
from .gridrank import channel_prior, marginalise_fits, rank_fits
from .selection import CRITERIA, information_criteria, marginalise, model_weights
from .systematics import SystematicsModel
from .whitelight import event_template

__all__ = ["Curves", "GridFit", "rank_fits", "channel_prior", "marginalise_fits", "fit_grid",
           "inherited_error"]


@dataclass(frozen=True)
class Curves:
    """A visit's light curves for :func:`fit_grid`.

    Attributes
    ----------
    inputs : SystematicsInputs
        Times, orbits, scan directions and covariates of the exposures
        (``exposure_start``, ``exposure_time`` for charge trapping).
    white_flux, white_variance : ndarray of float, shape (n_exposures,)
    white_mask : ndarray of bool, shape (n_exposures,)
        True where the white light is not fitted (bad, or left out).
    flux, variance : ndarray of float, shape (n_exposures, n_channels)
    mask : ndarray of bool, shape (n_exposures, n_channels)
    white_rate : ndarray of float, shape (n_exposures,), optional
        Incident rate per pixel (e-/s) for charge trapping.
    rate : ndarray of float, shape (n_exposures, n_channels), optional
    white_share : ndarray of float, shape (n_channels,), optional
        Fraction of each channel's flux inside the white band (default 1:
        the white light holds every channel); used for the variance of a
        channel divided by the white light (:mod:`.commonmode`).
    white_parts : (ndarray, ndarray), optional
        The white band's parts for charge trapping: their incident rates per
        pixel, shape (n_exposures, n_parts), and their shares of the white
        light's electrons, shape (n_parts,); the white light's trapping ramp
        is then the sum of the parts' ramps, each at its own rate
        (:class:`~lightledger.pipeline.components.TrapRamp`).
    """

    inputs: object
    white_flux: np.ndarray
    white_variance: np.ndarray
    white_mask: np.ndarray
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    white_rate: object = None
    rate: object = None
    white_share: object = None
    white_parts: object = None

    @property
    def n_channels(self):
        return self.flux.shape[1]

    def channel_inputs(self, j):
        """Inputs of channel ``j`` (its own incident rate for charge trapping)."""
        if self.rate is None:
            return self.inputs
        return replace(self.inputs, covariates={**self.inputs.covariates,
                                                "trap_rate": np.asarray(self.rate)[:, j]})

    def white_inputs(self):
        if self.white_rate is None:
            return self.inputs
        cov = {**self.inputs.covariates, "trap_rate": np.asarray(self.white_rate)}
        if self.white_parts is not None:
            rates, shares = self.white_parts
            rates = np.asarray(rates, float)
            for g in range(rates.shape[1]):
                cov[f"trap_rate.{g}"] = rates[:, g]
                cov[f"trap_share.{g}"] = np.full(rates.shape[0], float(np.asarray(shares)[g]))
        return replace(self.inputs, covariates=cov)


@dataclass(frozen=True)
class GridFit:
    """Every model of a grid fitted to a visit; returned by :func:`fit_grid`.

    Light curves are indexed ``0`` for the white light and ``1 + j`` for
    channel ``j`` (the order of a DEPTHS table).

    Attributes
    ----------
    specs : tuple of ModelSpec
    white_fits : tuple
        :class:`~lightledger.pipeline.whitelight.WhiteFit` of each model
        (shared by models with the same white model; None where the fit
        failed).
    white_owner : ndarray of int, shape (n_models,)
        Index of the model whose white fit each model uses (itself for the
        first model of each distinct white model).
    fits : tuple of tuple
        ``fits[m][c]``: the DetrendResult of model m on light curve c
        (channels relative to their own flux, common modes included in
        ``systematics`` and ``model``); None where it failed.
    chi2, bic, aic, weight, depth : ndarray of float, shape (n_models, 1 + n_channels)
    n_params, n_points : ndarray of int, shape (n_models, 1 + n_channels)
    error_covariance, error_beta, beta, error_permutation, error : ndarray of float, shape (n_models, 1 + n_channels)
        The depth error three ways, the beta factor, and the kind chosen.
    error_inherited : ndarray of float, shape (n_models, 1 + n_channels)
        The part of a channel's errors inherited from the white light's fit
        (its common mode, shapes and event; :func:`inherited_error`; for a
        common-mode model also the spread of the channel's depth over the
        white models' common modes), included in each of the three (0 for the
        white light).
    value, value_error, within, between : ndarray of float, shape (1 + n_channels,)
        Marginalised depth, its error, and the two parts of the error (NaN for
        a channel whose every exposure is masked: it is not fitted).
    best : ndarray of int, shape (1 + n_channels,)
        Top-weighted model of each light curve (-1 for a channel not fitted).
    common_mode_model : int
        Model whose white fit gave the common modes (-1 without).
    limb_darkening : (ndarray, ndarray)
        The channels' (u1, u2), each of shape (n_channels,).
    criterion, error_kind : str
    failures : tuple of str
        One line per failed fit.
    """

    def families(self, m):
        """Kinds of systematics model ``m`` describes, a common mode adding those of
        the white model it divides out."""
        out = set(self.specs[m].families)
        if self.specs[m].common_mode and self.common_mode_model >= 0:
            out |= self.specs[self.common_mode_model].families - {"common mode"}
        return out

    specs: tuple
    white_fits: tuple
    white_owner: np.ndarray
    fits: tuple
    chi2: np.ndarray
    bic: np.ndarray
    aic: np.ndarray
    weight: np.ndarray
    depth: np.ndarray
    n_params: np.ndarray
    n_points: np.ndarray
    error_covariance: np.ndarray
    error_beta: np.ndarray
    beta: np.ndarray
    error_permutation: np.ndarray
    error: np.ndarray
    error_inherited: np.ndarray
    value: np.ndarray
    value_error: np.ndarray
    within: np.ndarray
    between: np.ndarray
    best: np.ndarray
    common_mode_model: int
    limb_darkening: tuple
    criterion: str
    error_kind: str
    failures: tuple


#: Largest ratio of a fit's depth error to that of the event alone (with only a
#: constant beside it) for which the model is said to measure the depth: a
#: variance inflation factor of 100, far beyond the 10 that flags
#: collinear regressors (common practice).
MAX_ERROR_INFLATION = 10.0


#: Smallest white-light weight of a model whose common mode a common-mode member's
#: channels are refitted with (:func:`fit_grid`): the models below it together
#: hold a negligible share of the white light's weight.
MIN_CHOICE_WEIGHT = 1e-3


def _shared_mask(models, inputs_list, base):
    """Exposures where any model's columns (at its first grid values) are not finite."""
    bad = base.copy()
    for model in models:
        values = {name: float(sp.grid[0]) for name, sp in model.shape_params()}
        for inputs in inputs_list:
            cols = model.design(inputs, values).columns
            bad |= ~np.all(np.isfinite(cols), axis=1)
    return bad


def fit_grid(specs, curves, event, *, free=("t0",), criterion="bic", error_kind="covariance",
             n_shifts=100, stare=False, tau_grid=None, reference_rate=None, channel_ld=None,
             ld_prior=None, event_options=None, extra_components=(), progress=None, map=map):
    """Fit every model of a grid to the white light curve and every channel.

    Parameters
    ----------
    specs : sequence of ModelSpec
        The grid (:func:`lightledger.pipeline.modelspec.parse_grid`).
    curves : Curves
    event : dict
        A priori event (:func:`lightledger.pipeline.whitelight.event_template`).
    free : sequence of str, optional
        Event parameters the white light fits (default the mid-time).
    criterion : {"bic", "aic"}
    error_kind : {"covariance", "beta", "permutation", "largest"}
        The depth error each fit contributes to the marginalisation.
    n_shifts : int, optional
        Cyclic shifts of the permutation errors (0 = not computed).
    stare : bool, optional
        A continuous stare (no orbit-phase polynomial, no scan offset).
    tau_grid : array_like of float, optional
        Ramp time scales to try, days.
    reference_rate : float, optional
        Rate quoting trap fill times (e-/s/pixel); needed by trap models.
    channel_ld : (array_like, array_like), optional
        Per-channel limb darkening (u1, u2), each of shape (n_channels,);
        default the event's pair for every channel.
    ld_prior : float, optional
        Fit each channel's limb darkening instead, with the top-ranked white
        model and a Gaussian prior of this standard deviation centred on the
        event's pair (:func:`lightledger.pipeline.limbfit.fit_limb_darkening`);
        the fitted pairs are then used by every model.
    event_options : dict, optional
        Options of :func:`~lightledger.pipeline.eventfit.fit_event` for
        every fit (``mode``, the planet's phase-curve columns).
    extra_components : tuple, optional
        Components added to every model (e.g. phase sinusoids as systematics).
    progress : callable, optional
        ``progress(done, total, text)`` after each fit of a model.
    map : callable, optional
        ``map(function, jobs)`` returning the results in the jobs' order (the
        builtin by default).  The models' white fits, then each model's channel
        fits, are independent jobs: a process pool's ordered ``imap`` fits
        several models at once.  The results do not depend on it.

    Returns
    -------
    GridFit

    Notes
    -----
    A fit that fails (more parameters than points, everything masked) gets
    a non-finite chi-square, hence weight 0, and a line in ``failures``;
    when every model fails for a light curve, an error names the light
    curve.  Cost: the white fits (one per shape-grid value and event step
    per model) plus one linear fit per model and channel.
    """
    specs = tuple(specs)
    if error_kind not in ERROR_KINDS:
        raise ParameterError(f"error_kind must be one of {', '.join(ERROR_KINDS)}; got {error_kind!r}")
    if criterion not in CRITERIA:
        raise ParameterError(f"criterion must be one of {', '.join(CRITERIA)}; got {criterion!r}")
    opts = dict(event_options or {})
    n_models, n_ch = len(specs), curves.n_channels
    n_curves = 1 + n_ch
    models = [SystematicsModel(s.systematics(tau_grid=tau_grid, reference_rate=reference_rate,
                                             stare=stare).components + tuple(extra_components))
              for s in specs]
    shape_names = [[name for name, _ in model.shape_params()] for model in models]
    white_inputs = curves.white_inputs()
    chan_inputs = [curves.channel_inputs(j) for j in range(n_ch)]
    extra_bad = _shared_mask(models, [white_inputs] + chan_inputs[:1], np.zeros(white_inputs.n, bool))
    white_mask = np.asarray(curves.white_mask, bool) | extra_bad
    mask = np.asarray(curves.mask, bool) | extra_bad[:, None]
    owner = np.array([next(k for k in range(m + 1) if specs[k].white_name == specs[m].white_name)
                      for m in range(n_models)])
    u1 = np.full(n_ch, float(event["u1"])) if channel_ld is None else np.asarray(channel_ld[0], float)
    u2 = np.full(n_ch, float(event["u2"])) if channel_ld is None else np.asarray(channel_ld[1], float)
    shape = (n_models, n_curves)
    table = {k: np.full(shape, np.nan) for k in ("chi2", "depth", "error_covariance", "error_beta",
                                                 "beta", "error_permutation", "error",
                                                 "error_inherited")}
    n_params = np.zeros(shape, int)
    n_points = np.zeros(shape, int)
    failures = []
    fits = [[None] * n_curves for _ in range(n_models)]
    white_fits = [None] * n_models
    total = len(set(owner)) + n_models
    done = 0

    def record(m, c, res, errs, alone, inherited=0.0):
        label = "white light" if c == 0 else f"channel {c - 1}"
        if res.n_points <= res.n_params:
            failures.append(f"{specs[m].name} ({label}): {res.n_params} parameters for "
                            f"{res.n_points} exposures")
            return False
        if not (np.isfinite(res.depth) and np.isfinite(errs.pick(error_kind))):
            failures.append(f"{specs[m].name} ({label}): the depth or its error is not finite")
            return False
        inflation = errs.covariance / (alone * max(res.error_scale, 1.0))
        if inflation > MAX_ERROR_INFLATION:
            failures.append(f"{specs[m].name} ({label}): the depth is not determined (its error "
                            f"is {inflation:.0f} times that of the event alone: the model's "
                            f"systematics can mimic the event)")
            return False
        fits[m][c] = res
        table["chi2"][m, c] = res.chi2
        table["depth"][m, c] = res.depth
        n_params[m, c] = res.n_params
        n_points[m, c] = res.n_points
        table["error_covariance"][m, c] = errs.covariance
        table["error_beta"][m, c] = errs.beta
        table["beta"][m, c] = errs.beta_factor
        table["error_permutation"][m, c] = errs.permutation
        table["error"][m, c] = errs.pick(error_kind)
        table["error_inherited"][m, c] = inherited
        return True

    # 1. the white light, once per distinct white model
    jobs = [WhiteJob(m, white_inputs, curves.white_flux, curves.white_variance, models[m], event,
                      tuple(free), white_mask, opts, n_shifts, error_kind)
            for m in range(n_models) if owner[m] == m]
    for m, wf, errs, alone, error in map(fit_white_job, jobs):
        if error is not None:
            failures.append(f"{specs[m].white_name} (white light): {error}")
        if wf is not None and not record(m, 0, wf.result, errs, alone):
            wf = None
        white_fits[m] = wf
        done += 1
        if progress is not None:
            progress(done, total, f"white light: {specs[m].white_name}")
    distinct = owner == np.arange(n_models)
    if not np.any(np.isfinite(table["chi2"][distinct, 0])):
        raise AllMaskedError("no systematics model could be fitted to the white light curve: "
                             + "; ".join(failures[:3]))
    bic, aic = information_criteria(table["chi2"], n_params, np.maximum(n_points, 1))
    ic = bic if criterion == "bic" else aic
    w_white = np.zeros(n_models)
    w_white[distinct] = model_weights(ic[distinct, 0])
    cm_model = int(np.argmax(w_white))
    best_white = white_fits[cm_model]
    common = common_modes(best_white.result, curves.white_flux)
    # every white model the white light weighs, for the spread of a common-mode member
    choice = [k for k in np.argsort(-w_white) if w_white[k] >= MIN_CHOICE_WEIGHT]
    alternatives = {kind: tuple((float(w_white[k]),
                                 common_modes(white_fits[k].result, curves.white_flux)[kind])
                                for k in choice)
                    for kind in {s.common_mode for s in specs if s.common_mode}}

    if ld_prior is not None:
        pairs = []
        for j in range(n_ch):
            pairs.append(fit_limb_darkening(
                chan_inputs[j], curves.flux[:, j], curves.variance[:, j], models[cm_model],
                best_white.shapes, best_white.event, prior=(float(event["u1"]), float(event["u2"])),
                sigma=float(ld_prior), mask=mask[:, j], **opts))
        u1, u2 = (np.array(x) for x in zip(*pairs))

    # 2. the channels, at each model's white event and shapes (a channel whose every
    # exposure is masked, e.g. excluded by the observer, is not fitted)
    skipped = np.all(mask, axis=0)
    templates = {}
    jobs = []
    for m in range(n_models):
        wf = white_fits[owner[m]]
        if wf is None:
            continue
        if owner[m] not in templates:
            templates[owner[m]] = event_template(curves.inputs.time, wf.event, u1=u1, u2=u2)
        jobs.append(ChannelJob(m, curves, mask, skipped, templates[owner[m]], models[m],
                                shape_names[m], wf, best_white if specs[m].common_mode else None,
                                specs[m].common_mode, common.get(specs[m].common_mode), event,
                                u1, u2, opts, n_shifts, error_kind,
                                alternatives.get(specs[m].common_mode, ())))
    results = iter(map(fit_channels_job, jobs))
    for m in range(n_models):
        if white_fits[owner[m]] is None:
            failures.append(f"{specs[m].name} (channels): its white-light fit failed")
            done += 1
            continue
        for j, outcome in next(results):
            if isinstance(outcome, str):
                failures.append(f"{specs[m].name} (channel {j}): {outcome}")
                continue
            res, errs, alone, inherited = outcome
            record(m, 1 + j, res, errs, alone, inherited)
        done += 1
        if progress is not None:
            progress(done, total, f"channels: {specs[m].name}")

    # 3. ranking and marginalisation per light curve
    bic, aic = information_criteria(table["chi2"], n_params, np.maximum(n_points, 1))
    ic = bic if criterion == "bic" else aic
    weight = np.zeros(shape)
    weight[:, 0] = w_white
    prior = channel_prior(specs, w_white, owner, cm_model)
    for c in range(1, n_curves):
        if skipped[c - 1]:
            continue
        if not np.any(np.isfinite(ic[:, c])):
            raise AllMaskedError(f"no systematics model could be fitted to channel {c - 1}: "
                                 + "; ".join(f for f in failures if f"channel {c - 1}" in f)[:300])
        weight[:, c] = model_weights(ic[:, c], prior=prior)
    fitted = np.concatenate([[True], ~skipped])
    marg = marginalise(table["depth"][:, fitted], table["error"][:, fitted], weight[:, fitted], axis=0)
    value, value_error, within, between = (np.full(n_curves, np.nan) for _ in range(4))
    value[fitted], value_error[fitted] = marg.value, marg.error
    within[fitted], between[fitted] = marg.within, marg.between
    best = np.where(fitted, np.argmax(weight, axis=0), -1)
    return GridFit(specs=specs, white_fits=tuple(white_fits), white_owner=owner,
                   fits=tuple(tuple(row) for row in fits), chi2=table["chi2"], bic=bic, aic=aic,
                   weight=weight, depth=table["depth"], n_params=n_params, n_points=n_points,
                   error_covariance=table["error_covariance"], error_beta=table["error_beta"],
                   beta=table["beta"], error_permutation=table["error_permutation"],
                   error=table["error"], error_inherited=table["error_inherited"],
                   value=value, value_error=value_error,
                   within=within, between=between, best=best, common_mode_model=cm_model if any(
                       s.common_mode for s in specs) else -1,
                   limb_darkening=(u1, u2), criterion=criterion, error_kind=error_kind, failures=tuple(failures))
