"""The fits of one model of a grid, as independent jobs: the white light, and every channel.

:func:`lightledger.pipeline.grid.fit_grid` fits each model's white light
curve (:func:`fit_white_job`), then each model's channels at that white
fit's event and shapes (:func:`fit_channels_job`).  The jobs of one phase do
not depend on each other, so a caller may hand them to any ``map`` (a
process pool's, one BLAS thread per process); every job takes and returns
plain picklable records and gives the same numbers wherever it runs.
Masks: True = bad.  Inputs are not modified.
"""

from dataclasses import dataclass, replace

import numpy as np

from .commonmode import common_mode_choice, divide_common_mode
from .errors import LightledgerError
from .eventfit import fit_event
from .fiterrors import depth_errors, event_alone_error, linearise_fit
from .inherited import inherited_error
from .whitelight import event_template, fit_at_shapes, fit_white, radius_fixed_point

__all__ = ["WhiteJob", "ChannelJob", "fit_white_job", "fit_channels_job"]


@dataclass(frozen=True)
class WhiteJob:
    """One model's white-light fit: a job of :func:`~lightledger.pipeline.grid.fit_grid`."""

    m: int
    inputs: object
    flux: np.ndarray
    variance: np.ndarray
    model: object
    event: dict
    free: tuple
    mask: np.ndarray
    options: dict
    n_shifts: int
    error_kind: str


def _alone(res, errs, lin, error_kind):
    """The event-alone depth error, NaN where fit_grid rejects the fit before its inflation test."""
    if res.n_points <= res.n_params or not (np.isfinite(res.depth)
                                            and np.isfinite(errs.pick(error_kind))):
        return float("nan")             # fit_grid's record() rejects it before the test
    return event_alone_error(lin)


def fit_white_job(job):
    """(m, WhiteFit or None, DepthErrors, event-alone error, failure text or None)."""
    try:
        wf = fit_white(job.inputs, job.flux, job.variance, job.model, job.event, free=job.free,
                       mask=job.mask, **job.options)
    except (LightledgerError, np.linalg.LinAlgError) as exc:
        return job.m, None, None, None, str(exc)
    errs = depth_errors(wf.result, wf.linearisation, job.flux, n_shifts=job.n_shifts)
    return job.m, wf, errs, _alone(wf.result, errs, wf.linearisation, job.error_kind), None


@dataclass(frozen=True)
class ChannelJob:
    """Every channel of one model at its white fit's event and shapes."""

    m: int
    curves: object
    mask: np.ndarray
    skipped: np.ndarray
    template: np.ndarray
    model: object
    shape_names: list
    white: object
    common_white: object
    common_mode: object
    common: object
    event: dict
    u1: np.ndarray
    u2: np.ndarray
    options: dict
    n_shifts: int
    error_kind: str
    alternatives: tuple = ()


def fit_channels_job(job):
    """[(j, (DetrendResult, DepthErrors, event-alone error, inherited error)) or (j, failure text)].

    Each channel is divided by its common mode (if any; its variance by
    :func:`~lightledger.pipeline.commonmode.divide_common_mode`), fitted at the white
    fit's shapes (a transit at the channel's own fitted radius), its depth
    errors computed with what it inherits from the white fit, and the common
    mode multiplied back into its systematics and model.

    A common-mode member's channel is also refitted (its template and columns
    held) with the common mode of each white model in ``job.alternatives``
    (pairs of the white light's weight and that model's common mode): its
    depth becomes the weighted mean over them and their spread
    (:func:`~lightledger.pipeline.commonmode.common_mode_choice`) is added to what it inherits, so that the white
    light's choice of model reaches the channels that divide it out, as it
    reaches the white light's own marginalised depth.  The fit's model and
    detrended light curve stay those of the top white model's common mode.
    """
    curves, wf, opts, event = job.curves, job.white, job.options, job.event
    share = (None if curves.white_share is None
             else np.clip(np.asarray(curves.white_share, float), 0.0, 1.0))
    u1, u2, mask, model = job.u1, job.u2, job.mask, job.model
    out = []
    for j in range(curves.n_channels):
        if job.skipped[j]:
            continue
        inputs = curves.channel_inputs(j)
        if job.common is None:
            g = np.ones(curves.flux.shape[0])
            f, v = curves.flux[:, j], curves.variance[:, j]
        else:
            g = job.common
            f, v = divide_common_mode(curves.flux[:, j], curves.variance[:, j], g,
                                      kind=job.common_mode, white_flux=curves.white_flux,
                                      white_variance=curves.white_variance,
                                      share=1.0 if share is None else share[j])
        try:
            design = model.design(inputs, wf.shapes)      # made once, for every refit below

            def refit(tm, f=f, v=v, j=j, design=design):
                return fit_event(f, v, tm, design.columns, mask=mask[:, j],
                                 basis_names=design.names, **opts)

            res = refit(job.template[:, j])
            t_j = job.template[:, j]
            if event["kind"] == "transit":
                # the channel's transit at its own fitted radius (whitelight.radius_fixed_point)
                ev_j, t_j, res, _ = radius_fixed_point(
                    lambda ev, j=j: event_template(curves.inputs.time, ev, u1=float(u1[j]),
                                                   u2=float(u2[j])),
                    refit, wf.event, t_j, res)
            else:
                ev_j = wf.event
            lin = linearise_fit(res, design.columns, t_j, v,
                                planet_basis=opts.get("planet_basis"),
                                planet_at_event=opts.get("planet_at_event"))
            extra = inherited_error(
                res, lin, t_j, curves.inputs.time, ev_j, (u1[j], u2[j]), wf,
                job.common_white, job.common_mode,
                lambda shapes, f=f, v=v, j=j, t_j=t_j, inputs=inputs: fit_at_shapes(
                    inputs, f, v, t_j, model, shapes, mask=mask[:, j], **opts)[0].depth,
                job.shape_names) ** 2
            if job.common is not None and len(job.alternatives) > 1:
                mean, spread = common_mode_choice(
                    curves.flux[:, j], curves.variance[:, j], job.alternatives,
                    lambda fk, vk, j=j, t_j=t_j, design=design: fit_event(
                        fk, vk, t_j, design.columns, mask=mask[:, j], basis_names=design.names,
                        **opts).depth,
                    kind=job.common_mode, white_flux=curves.white_flux,
                    white_variance=curves.white_variance, share=1.0 if share is None else share[j])
                if np.isfinite(mean):
                    res = replace(res, depth=mean)
                    extra += spread
            errs = depth_errors(res, lin, f, n_shifts=job.n_shifts, inherited=extra)
            alone = _alone(res, errs, lin, job.error_kind)
        except (LightledgerError, np.linalg.LinAlgError) as exc:
            out.append((j, str(exc)))
            continue
        res = replace(res, systematics=res.systematics * g, model=res.model * g,
                      star=None if res.star is None else res.star * g)
        out.append((j, (res, errs, alone, float(np.sqrt(extra)))))
    return out
