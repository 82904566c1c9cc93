"""What every figure shares: a fixed layout, images with labelled colour bars, flag images,
decimated rows of per-exposure data and binned points for long visits.

The conventions of DEVELOPERS.md ("Surface"): pixel (or wavelength) axes with
units, a labelled colour bar on every image, flags drawn by their gravest bit
(:func:`flag_image`), a fixed layout (:func:`_figure`), :func:`decimate_rows`
for images of per-exposure data and :func:`binned_points` over faint
unbinned points for visits longer than :data:`LONG_VISIT` exposures.  Used
by :mod:`.figures`, :mod:`.figures_detrend` and :mod:`.figures_overlay`.
"""

import warnings

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from lightledger.pipeline import mask as dq  # noqa: E402

__all__ = ["decimate_rows", "flag_image", "binned_points", "MAX_ROWS", "LONG_VISIT", "plt"]


#: Most rows of an image drawn from per-exposure data (a figure is ~800 pixels tall).
MAX_ROWS = 600


def decimate_rows(values, max_rows=MAX_ROWS):
    """Mean of consecutive groups of rows (NaN ignored), so at most ``max_rows`` remain.

    Returns ``(decimated, step)``; ``step`` rows of ``values`` make one row.
    """
    values = np.asarray(values)
    step = max(1, -(-len(values) // max_rows))
    if step == 1:
        return values, 1
    n = len(values) // step * step
    groups = values[:n].reshape((n // step, step) + values.shape[1:])
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)        # a group of NaN only
        out = np.nanmean(groups, axis=1)
        if n < len(values):
            out = np.concatenate([out, np.nanmean(values[n:], axis=0, keepdims=True)])
    return out, step


def _hours(days):
    days = np.asarray(days, float)
    return (days - days[0]) * 24.0


def _figure(rows, cols, size, **space):
    """A figure with a fixed layout (constrained layout costs ~40 % of the drawing time)."""
    fig, axes = plt.subplots(rows, cols, figsize=size, squeeze=False)
    fig.subplots_adjust(**{"left": 0.07, "right": 0.97, "bottom": 0.07, "top": 0.93,
                           "wspace": 0.32, "hspace": 0.42, **space})
    return fig, axes


def _image(fig, ax, image, *, label, cmap="magma", percentiles=(1, 99.5), **kw):
    """An image in pixel coordinates with a labelled colour bar."""
    finite = np.isfinite(image)
    lo, hi = (np.percentile(image[finite], percentiles) if finite.any() else (0.0, 1.0))
    if not hi > lo:
        hi = lo + 1.0
    kw = {"origin": "lower", "aspect": "auto", "cmap": cmap, "vmin": lo, "vmax": hi,
          "interpolation": "nearest", **kw}
    im = ax.imshow(image, **kw)
    fig.colorbar(im, ax=ax, label=label, fraction=0.05, pad=0.02)
    return im


def _pixel_axes(ax):
    ax.set_xlabel("column (pixel)")
    ax.set_ylabel("row (pixel)")


#: One colour per flag, in bit order (colour-blind-safe qualitative palette, then greys).
_FLAG_COLOURS = ("#88CCEE", "#DDCC77", "#CC6677", "#AA4499", "#44AA99", "#999933",
                 "#882255", "#332288", "#000000")


def flag_image(fig, ax, bits):
    """The mask as its gravest flag per pixel, with a colour bar labelled by value and name.

    Returns the names of the flags present.
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap

    bits = np.asarray(bits, dtype=np.int64)
    present = [(name, value) for name, value in dq.FLAGS.items() if np.any(bits & value)]
    shown = np.zeros(bits.shape, int)
    for k, (name, value) in enumerate(present, start=1):   # bit order: the gravest comes last
        shown[(bits & value) > 0] = k
    colours = ["#FFFFFF"] + [_FLAG_COLOURS[list(dq.FLAGS).index(n) % len(_FLAG_COLOURS)]
                             for n, _ in present]
    cmap = ListedColormap(colours)
    norm = BoundaryNorm(np.arange(len(colours) + 1) - 0.5, len(colours))
    im = ax.imshow(shown, origin="lower", aspect="auto", cmap=cmap, norm=norm,
                   interpolation="nearest")
    bar = fig.colorbar(im, ax=ax, ticks=np.arange(len(colours)), fraction=0.05, pad=0.02)
    counts = [int(np.count_nonzero(bits & v)) for _, v in present]
    bar.set_ticklabels(["0 clean"] + [f"{v} {n} ({c})" for (n, v), c in zip(present, counts)])
    bar.ax.tick_params(labelsize=7)
    bar.set_label("gravest flag: bit value, name (pixels)")
    _pixel_axes(ax)
    return [n for n, _ in present]


def _shade_rows(ax, lo, hi, *, colour, label, alpha=0.18):
    ax.axhspan(lo - 0.5, hi - 0.5, color=colour, alpha=alpha, lw=0, label=label)


def _hatch_rows(ax, lo, hi, *, colour, label):
    ax.axhspan(lo - 0.5, hi - 0.5, facecolor="none", edgecolor=colour, hatch="///", lw=0.8,
               label=label)


def binned_points(t, y, n_bins):
    """Means of ``y`` in ``n_bins`` consecutive groups of (sorted) ``t``; NaN ignored.

    Returns ``(t_mean, y_mean, y_error)``; the error is the scatter of the group
    over the square root of its size (groups of one have NaN error).
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    ok = np.isfinite(t) & np.isfinite(y)
    t, y = t[ok], y[ok]
    order = np.argsort(t)
    t, y = t[order], y[order]
    n_bins = int(max(1, min(n_bins, t.size)))
    groups = np.array_split(np.arange(t.size), n_bins)
    tm = np.array([t[g].mean() for g in groups if g.size])
    ym = np.array([y[g].mean() for g in groups if g.size])
    ye = np.array([y[g].std(ddof=1) / np.sqrt(g.size) if g.size > 1 else np.nan
                   for g in groups if g.size])
    return tm, ym, ye


#: Exposures above which light curves are drawn as faint points with binned points on top.
LONG_VISIT = 300


def _limits(values, errors, lit):
    """y limits from the points with light (their values +- errors), with a margin."""
    v = np.asarray(values, float)[lit]
    e = np.zeros_like(v) if errors is None else np.asarray(errors, float)[lit]
    ok = np.isfinite(v) & np.isfinite(e)
    if not ok.any():
        return None
    lo, hi = float(np.min(v[ok] - e[ok])), float(np.max(v[ok] + e[ok]))
    pad = 0.08 * (hi - lo) if hi > lo else max(abs(hi), 1.0) * 0.1
    return lo - pad, hi + pad
