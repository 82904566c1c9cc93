"""Figures of the detrend stage: each light curve with its models, residuals and noise test.

For the white band (``detrend.png``) and for every channel
(``detrend-channels.png``), four views of one fit:

* the light curve as measured (divided by its median) with the full model
  (systematics times event), drawn as a line over the exposures that entered
  the fit and broken at gaps (orbit gaps, left-out exposures), so that no
  model is drawn where there are no data;
* the detrended light curve (divided by the systematics) with the event model
  as a line, likewise; for visits longer than :data:`figures.LONG_VISIT`
  exposures, faint points (every k-th beyond :data:`FAINT_POINTS`) with binned
  points on top;
* the residuals in ppm, with the band of one median error;
* the rms of the residuals binned over N exposures against N, with the
  white-noise expectation sigma_1 / sqrt(N) sqrt(M / (M - 1)) for M bins
  (Pont, Zucker & Queloz 2006); points above the line are correlated noise.

``detrend.png`` adds the depth spectrum, its axis scaled on the channels that
have light (dim channels may fall outside it, their points marked).
"""

import numpy as np

from lightledger.pipeline.diagnostics import binned_rms
from lightledger.pipeline.errors import LightledgerError

from .figurekit import LONG_VISIT, _figure, _hours, _limits, binned_points, plt
from .products import save_figure

__all__ = ["detrend_figure", "detrend_channels_figure", "segments"]

#: Faint points drawn per panel at most (under the binned points); a visit of more
#: exposures shows every k-th, which the eye cannot tell from all at this size.
FAINT_POINTS = 3000


def segments(time, used, gap_factor=3.0):
    """Index arrays of runs of used exposures, split at gaps.

    A gap is a step in time longer than ``gap_factor`` times the median step
    between used exposures, or an exposure left out of the fit.
    """
    t = np.asarray(time, float)
    used = np.asarray(used, bool) & np.isfinite(t)
    order = np.argsort(t)
    runs, current = [], []
    step = np.median(np.diff(t[order][used[order]])) if used.sum() > 1 else np.inf
    last = None
    for i in order:
        if not used[i]:
            if current:
                runs.append(np.array(current))
            current, last = [], None
            continue
        if last is not None and t[i] - t[last] > gap_factor * step:
            runs.append(np.array(current))
            current = []
        current.append(i)
        last = i
    if current:
        runs.append(np.array(current))
    return runs


def _model_line(ax, t_hours, values, runs, colour, label):
    """A model as a line over each run of fitted exposures (a dash for a run of one)."""
    for k, run in enumerate(runs):
        name = label if k == 0 else None
        if run.size == 1:
            ax.plot(t_hours[run], values[run], "_", ms=10, color=colour, label=name)
        else:
            ax.plot(t_hours[run], values[run], "-", lw=1.2, color=colour, label=name)


def _points(ax, t, y, e, colour, long_visit, label=None):
    if long_visit:
        step = -(-len(t) // FAINT_POINTS)         # every k-th point of a very long visit
        ax.plot(t[::step], y[::step], ".", ms=1.5, color=colour, alpha=0.35, label=label)
        tb, yb, eb = binned_points(t, y, 100)
        ax.errorbar(tb, yb, eb, fmt="o", ms=3, color="k", label="binned (100 bins)")
    else:
        ax.errorbar(t, y, e, fmt=".", ms=4, color=colour, label=label, elinewidth=0.8)


def _fine_line(ax, t_hours, runs, line, colour, label):
    """The event model on a fine time grid, drawn only over each run of fitted exposures."""
    tf, yf = (np.asarray(a, float) for a in line)
    for k, run in enumerate(runs):
        inside = (tf >= t_hours[run].min()) & (tf <= t_hours[run].max())
        if inside.sum() >= 2:
            ax.plot(tf[inside], yf[inside], "-", lw=1.2, color=colour, label=label if k == 0 else None)
        else:
            ax.plot(t_hours[run], np.interp(t_hours[run], tf, yf), "_", ms=10, color=colour,
                    label=label if k == 0 else None)


def _one_fit(axes, t, flux, error, model, systematics, used, label, *, compact=False,
             event_line=None):
    """Draw the four views of one fit into ``axes`` (a sequence of four Axes)."""
    flux = np.asarray(flux, float)
    error = np.asarray(error, float)
    model = np.asarray(model, float)
    systematics = np.asarray(systematics, float)
    used = np.asarray(used, bool) & np.isfinite(flux) & np.isfinite(model) & np.isfinite(systematics)
    runs = segments(t, used)
    long_visit = used.sum() > LONG_VISIT
    fs = 8 if compact else 9
    with np.errstate(all="ignore"):
        med = np.nanmedian(flux[used]) if used.any() else np.nan
        raw, raw_err, full = flux / med, error / med, model / med
        detr = flux / systematics
        detr_err = error / systematics
        event = model / systematics
        resid = (detr - event) * 1e6
    ax = axes[0]
    _points(ax, t[used], raw[used], raw_err[used], "tab:blue", long_visit, label="fitted")
    if np.any(~used & np.isfinite(raw)):
        ax.plot(t[~used], raw[~used], "x", ms=4, color="0.6", label="left out")
    _model_line(ax, t, full, runs, "tab:red", "full model")
    ax.set_ylabel("flux / median", fontsize=fs)
    ax.set_title(f"{label}: measured, with systematics x event", fontsize=fs, y=1.0)
    ax.legend(fontsize=6, loc="best")
    ax = axes[1]
    _points(ax, t[used], detr[used], detr_err[used], "tab:green", long_visit)
    if event_line is not None:
        _fine_line(ax, t, runs, event_line, "k", "event model")
    else:
        _model_line(ax, t, event, runs, "k", "event model")
    ax.set_ylabel("flux / systematics", fontsize=fs)
    ax.set_title(f"{label}: detrended, with the event model", fontsize=fs, y=1.0)
    ax.legend(fontsize=6, loc="best")
    ax = axes[2]
    _points(ax, t[used], resid[used], detr_err[used] * 1e6, "tab:purple", long_visit)
    sigma = np.nanmedian(detr_err[used]) * 1e6 if used.any() else np.nan
    if np.isfinite(sigma):
        ax.axhspan(-sigma, sigma, color="0.85", zorder=0, label="+-1 median error")
    ax.axhline(0.0, color="k", lw=0.8)
    ax.set_ylabel("residual (ppm)", fontsize=fs)
    rms = float(np.sqrt(np.nanmean(resid[used] ** 2))) if used.any() else np.nan
    ax.set_title(f"{label}: residuals, rms {rms:.0f} ppm", fontsize=fs, y=1.0)
    for a in axes[:3]:
        a.set_xlabel("hours since the first exposure", fontsize=fs)
        a.tick_params(labelsize=7)
    ax = axes[3]
    r = resid[used][np.argsort(t[used])]
    r = r[np.isfinite(r)]
    if r.size >= 8:
        sizes = np.unique(np.geomspace(1, r.size // 4, 16).astype(int))
        test = binned_rms(r, sizes)
        ax.loglog(test.bin_sizes, test.rms, "o", ms=4, color="tab:purple", label="binned residuals")
        ax.loglog(test.bin_sizes, test.expected, "-", color="k", lw=1,
                  label="white noise (Pont et al. 2006)")
        ax.set_title(f"{label}: rms against bin size, beta {test.beta:.2f}", fontsize=fs, y=1.0)
        ax.legend(fontsize=6, loc="lower left")
    else:
        ax.set_title(f"{label}: too few residuals to bin", fontsize=fs, y=1.0)
    ax.set_xlabel("exposures per bin", fontsize=fs)
    ax.set_ylabel("rms of binned residuals (ppm)", fontsize=fs)
    ax.tick_params(labelsize=7)


def detrend_figure(path, time, white, white_error, white_model, white_systematics, used,
                   wave_mid, depth, depth_error, kind, *, lit=None, label="white band",
                   event_line=None):
    """The white-band fit in four views, and the depth spectrum.

    Parameters
    ----------
    path : path-like
        PNG to write.
    time : ndarray (n_exposures,)
        BJD_TDB, d.
    white, white_error, white_model, white_systematics : ndarray (n_exposures,)
        Measured white flux and its error, the full model and the systematics
        model (electrons).
    used : ndarray of bool (n_exposures,)
        True where the exposure entered the fit.
    wave_mid, depth, depth_error : ndarray (n_channels,)
        Channel centres (um) and depths with their errors (fractions).
    kind : str
        The event, for the depth axis label.
    lit : ndarray of bool (n_channels,), optional
        True for channels with light; the depth axis is scaled on them.
    label : str
        Name of the white band in the titles.
    event_line : (ndarray, ndarray), optional
        The event model on a fine grid of BJD_TDB (d), drawn instead of the
        line through the model at the exposures.
    """
    fig, axes = _figure(2, 3, (17, 9), left=0.05, right=0.98, wspace=0.3, hspace=0.35)
    t = _hours(time)
    line = None if event_line is None else ((np.asarray(event_line[0], float) - time[0]) * 24.0,
                                            event_line[1])
    _one_fit([axes[0, 0], axes[0, 1], axes[1, 0], axes[1, 1]], t, white, white_error, white_model,
             white_systematics, used, label, event_line=line)
    axes[1, 2].remove()
    ax = axes[0, 2]
    ax.set_position([0.69, 0.09, 0.29, 0.84])
    wave_mid = np.asarray(wave_mid, float)
    d = np.asarray(depth, float) * 1e6
    e = np.asarray(depth_error, float) * 1e6
    lit = np.ones(d.size, bool) if lit is None else np.asarray(lit, bool)
    if d.size:
        ax.errorbar(wave_mid[lit], d[lit], e[lit], fmt="o", color="tab:purple", capsize=2,
                    label="channels with light")
        if np.any(~lit):
            ax.errorbar(wave_mid[~lit], d[~lit], e[~lit], fmt="x", color="0.6", capsize=2,
                        label="dim channels")
        limits = _limits(d, e, lit) if np.any(lit) else None
        if limits:
            ax.set_ylim(*limits)
        ax.legend(fontsize=7)
    ax.set_xlabel("wavelength (um)")
    ax.set_ylabel(f"{kind} depth (ppm)")
    ax.set_title("depth spectrum (axis scaled on the channels with light)", fontsize=9)
    return save_figure(fig, path)


def detrend_channels_figure(path, time, flux, error, model, systematics, used, labels, *,
                            dim=None, event_lines=None):
    """Every channel's fit in four views, one row per channel.

    Parameters
    ----------
    path : path-like
        PNG to write.
    time : ndarray (n_exposures,)
        BJD_TDB, d.
    flux, error, model, systematics : ndarray (n_exposures, n_channels)
        Measured flux and error, full model and systematics model (electrons).
    used : ndarray of bool, (n_exposures,) or (n_exposures, n_channels)
        True where an exposure entered the channel's fit.
    labels : sequence of str
        One label per channel (e.g. ``"channel 3, 1.51-1.58 um"``).
    dim : ndarray of bool (n_channels,), optional
        Dim channels get "(dim)" in their titles.
    event_lines : sequence of (ndarray, ndarray) or None, optional
        Per channel, the event model on a fine grid of BJD_TDB (d).
    """
    flux = np.asarray(flux, float)
    if flux.ndim != 2 or flux.shape[1] != len(labels):
        raise LightledgerError(f"{path}: detrend_channels_figure needs one label per channel")
    n = flux.shape[1]
    used = np.asarray(used, bool)
    used = np.broadcast_to(used[:, None] if used.ndim == 1 else used, flux.shape)
    dim = np.zeros(n, bool) if dim is None else np.asarray(dim, bool)
    fig, axes = _figure(n, 4, (20, 2.6 * n + 0.6), left=0.04, right=0.99, bottom=0.5 / (2.6 * n + 0.6),
                        top=1 - 0.3 / (2.6 * n + 0.6), wspace=0.28, hspace=0.75)
    t = _hours(time)
    for j in range(n):
        line = None
        if event_lines is not None and event_lines[j] is not None:
            line = ((np.asarray(event_lines[j][0], float) - time[0]) * 24.0, event_lines[j][1])
        _one_fit(axes[j], t, flux[:, j], np.asarray(error, float)[:, j],
                 np.asarray(model, float)[:, j], np.asarray(systematics, float)[:, j], used[:, j],
                 labels[j] + (" (dim)" if dim[j] else ""), compact=True, event_line=line)
    return save_figure(fig, path)
