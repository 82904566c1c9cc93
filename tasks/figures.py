"""Diagnostic figures of each stage (PNG, written through :func:`products.save_figure`)."""

import warnings

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from lightledger.pipeline import mask as dq  # noqa: E402

from .products import save_figure  # noqa: E402

__all__ = ["calibrate_figure", "extract_figure", "bin_figure", "detrend_figure",
           "detrend_channels_figure", "flag_image",
           "binned_points", "decimate_rows", "stage_spectrum", "overlay_png"]


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


def calibrate_figure(path, frame, bits, exposures, *, source_rows=None, scanning=False):
    """A calibrated frame with its source and sky rows, its mask, the sky level and flags in time.

    Parameters
    ----------
    path : path-like
        PNG to write.
    frame, bits : ndarray of shape (n_rows, n_columns)
        One calibrated exposure (electrons) and its data-quality bits.
    exposures : astropy.table.Table
        The stage's per-exposure table.
    source_rows : (int, int), optional
        Rows ``[lo, hi)`` where the source was expected (kept out of the sky model).
    scanning : bool
        A scan: the scanned band is drawn from the frame's UNSCANNED flags.
    """
    fig, axes = _figure(2, 2, (13, 8), right=0.86, wspace=0.45)
    ax = axes[0, 0]
    _image(fig, ax, frame, label="electrons per pixel")
    _pixel_axes(ax)
    ax.set_title("calibrated frame (first exposure of the middle chunk)", fontsize=10)
    if scanning:
        covered = np.flatnonzero(np.mean((bits & dq.UNSCANNED) == 0, axis=1) > 0.5)
        if covered.size:
            ax.axhline(covered[0] - 0.5, color="cyan", lw=1.2, label="scanned band (from the data)")
            ax.axhline(covered[-1] + 0.5, color="cyan", lw=1.2)
    if source_rows is not None:
        lo, hi = source_rows
        _shade_rows(ax, lo, hi, colour="white", label="expected source rows (not sky)")
        ny = frame.shape[0]
        if lo > 0:
            _hatch_rows(ax, 0, lo, colour="tab:green", label="sky rows")
        if hi < ny:
            _hatch_rows(ax, hi, ny, colour="tab:green", label=None if lo > 0 else "sky rows")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=7, loc="upper right", framealpha=0.7)
    flag_image(fig, axes[0, 1], bits)
    axes[0, 1].set_title("data-quality flags of the same exposure", fontsize=10)
    t = _hours(exposures["start_mjd_utc"])
    axes[1, 0].plot(t, exposures["background_level"], ".", color="tab:blue", ms=3)
    axes[1, 0].set_xlabel("hours since the first exposure")
    axes[1, 0].set_ylabel("sky level (electrons per pixel)")
    axes[1, 0].set_title("sky background subtracted from each exposure", fontsize=10)
    for name, value in dq.FLAGS.items():
        col = f"n_{name.lower()}"
        if col in exposures.colnames and np.any(exposures[col]):
            axes[1, 1].plot(t, np.asarray(exposures[col], float), ".", ms=3, label=f"{value} {name}",
                            color=_FLAG_COLOURS[list(dq.FLAGS).index(name) % len(_FLAG_COLOURS)])
    axes[1, 1].set_yscale("log")
    axes[1, 1].set_xlabel("hours since the first exposure")
    axes[1, 1].set_ylabel("flagged pixels per exposure")
    axes[1, 1].set_title("flagged pixels by flag (value and name)", fontsize=10)
    if axes[1, 1].get_legend_handles_labels()[0]:
        axes[1, 1].legend(fontsize=7, ncol=2)
    return save_figure(fig, path)


def extract_figure(path, wavelength, flux, exposures, profile_image, *, median_frame=None,
                   aperture=None, band=None, trace_rows=None, sky_rows=None, method="optimal",
                   profile_row=0):
    """The extraction region on the median frame, the profile, the spectra and the drifts.

    Parameters
    ----------
    path : path-like
        PNG to write.
    wavelength : ndarray (n_pixels,)
        Wavelength of each pixel of the spectra, um.
    flux : ndarray (n_exposures, n_pixels)
        Spectra, electrons per pixel, NaN where masked.
    exposures : astropy.table.Table
        Per-exposure table with ``start_mjd_utc``, ``dx``, ``dy``, ``width``.
    profile_image : ndarray (n_rows, n_columns)
        Spatial profile of the first exposure (weights of the extraction).
    median_frame : ndarray (n_rows, n_columns), optional
        The median calibrated frame, electrons.
    aperture : (int, int), optional
        Rows ``[lo, hi)`` of the extraction.
    band : (float, float), optional
        Edges of the scanned band, rows.
    trace_rows : ndarray (n_columns,), optional
        Trace centre per column, rows.
    sky_rows : (int, int), optional
        Rows kept out of the sky model (the rest are sky rows).
    method : str
        ``"optimal"`` or ``"box"``, for the profile's label.
    profile_row : int
        Frame row of the profile image's first row.
    """
    fig, axes = _figure(3, 2, (12, 11), hspace=0.5, right=0.9, wspace=0.4)
    n_exposures = len(flux)
    t = _hours(exposures["start_mjd_utc"])
    ax = axes[0, 0]
    if median_frame is not None:
        _image(fig, ax, median_frame, label="electrons per pixel")
        ny, nx = median_frame.shape
        if sky_rows is not None:
            lo, hi = sky_rows
            if lo > 0:
                _hatch_rows(ax, 0, lo, colour="tab:green", label="sky rows")
            if hi < ny:
                _hatch_rows(ax, hi, ny, colour="tab:green", label=None if lo > 0 else "sky rows")
        if aperture is not None:
            ax.axhline(aperture[0] - 0.5, color="white", lw=1.2, ls="--", label="extraction rows")
            ax.axhline(aperture[1] - 0.5, color="white", lw=1.2, ls="--")
        if band is not None:
            ax.axhline(band[0], color="cyan", lw=1.2, label="scanned band")
            ax.axhline(band[1], color="cyan", lw=1.2)
        if trace_rows is not None:
            ax.plot(np.arange(nx), trace_rows, color="cyan", lw=1.0, label="trace centre")
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7, loc="upper right", framealpha=0.7)
    _pixel_axes(ax)
    ax.set_title("median calibrated frame and the extraction region", fontsize=10)

    ax = axes[0, 1]
    prof = np.asarray(profile_image, float)
    rows = profile_row + np.arange(prof.shape[0] + 1) - 0.5
    label = ("profile that patches masked pixels" if method == "box"
             else "profile: fraction of the column's flux")
    _image(fig, ax, prof, label=label, cmap="viridis", percentiles=(0, 100),
           extent=[-0.5, prof.shape[1] - 0.5, rows[0], rows[-1]])
    _pixel_axes(ax)
    ax.set_title(f"spatial profile of the first exposure ({method} extraction)", fontsize=10)

    ax = axes[1, 0]
    shown, step = decimate_rows(flux)           # means of consecutive exposures, at most 600 rows
    med = np.nanmedian(shown, axis=0)
    top = np.nanmax(med) if np.any(np.isfinite(med)) else 0.0
    bright = np.isfinite(med) & (med > 0.2 * top)   # the faint ends would swamp the colour scale
    ratio = shown / np.where(bright, med, np.nan)
    scale = np.nanmedian(ratio[:, bright], axis=1, keepdims=True) if np.any(bright) else 1.0
    ratio = ratio / scale
    finite = np.isfinite(ratio)
    lo, hi = np.percentile(ratio[finite], [1, 99]) if finite.any() else (0.99, 1.01)
    im = ax.imshow(ratio, origin="lower", aspect="auto", cmap="viridis", vmin=lo, vmax=hi,
                   interpolation="nearest",
                   extent=[wavelength[0], wavelength[-1], -0.5, n_exposures - 0.5])
    fig.colorbar(im, ax=ax, label="flux / median spectrum", fraction=0.05, pad=0.02)
    ax.set_xlabel("wavelength (um)")
    ax.set_ylabel("exposure" + (f" (means of {step})" if step > 1 else ""))
    ax.set_title("spectra relative to the median spectrum (white = masked)", fontsize=10)

    ax = axes[1, 1]
    ax.plot(wavelength, np.nanmedian(flux, axis=0), color="k", lw=1)
    ax.set_xlabel("wavelength (um)")
    ax.set_ylabel("median spectrum (electrons per pixel)")
    ax.set_title("median spectrum", fontsize=10)

    for name, colour in (("dx", "tab:blue"), ("dy", "tab:orange")):
        axes[2, 0].plot(t, exposures[name], ".", ms=3, color=colour,
                        label={"dx": "dx, along the dispersion", "dy": "dy, across it"}[name])
    axes[2, 0].set_xlabel("hours since the first exposure")
    axes[2, 0].set_ylabel("shift from the reference (pixels)")
    axes[2, 0].legend(fontsize=7)
    axes[2, 0].set_title("spectrum drifts", fontsize=10)
    axes[2, 1].plot(t, exposures["width"], ".", ms=3, color="tab:purple")
    axes[2, 1].set_xlabel("hours since the first exposure")
    axes[2, 1].set_ylabel("trace sigma or band length (pixels)")
    axes[2, 1].set_title("width of the trace or length of the scanned band", fontsize=10)
    return save_figure(fig, path)


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


def bin_figure(path, lc, channels, spectrum=None, lit=None):
    """Channel light curves, the white light curve and the channels on the median spectrum.

    Parameters
    ----------
    path : path-like
        PNG to write.
    lc : astropy.table.Table
        LIGHTCURVES of the bin stage.
    channels : astropy.table.Table
        CHANNELS (with ``dim``, ``light`` when known).
    spectrum : astropy.table.Table, optional
        SPECTRUM (``wave_lo``, ``wave_hi``, ``flux``) for the channel panel.
    lit : (float, float), optional
        The lit part of the spectrum, um.
    """
    fig, axes = _figure(1, 3, (16, 6), wspace=0.3, left=0.05, right=0.98, bottom=0.1, top=0.9)
    t = _hours(lc["time_bjd_tdb"])
    flux = np.asarray(lc["flux"], float)
    mask = np.asarray(lc["mask"], bool)
    with np.errstate(all="ignore"):
        med = np.nanmedian(np.where(mask, np.nan, flux), axis=0)
        norm = np.where(mask, np.nan, flux) / np.where(med > 0, med, np.nan)
    spread = 4 * np.nanstd(norm - 1) if np.any(np.isfinite(norm)) else 0.01
    spread = spread if np.isfinite(spread) and spread > 0 else 0.01
    dim = np.asarray(channels["dim"], bool) if "dim" in channels.colnames else np.zeros(len(channels), bool)
    cmap = plt.get_cmap("viridis")
    n = norm.shape[1]
    long_visit = len(t) > LONG_VISIT
    for j in range(n):
        colour = "0.6" if dim[j] else cmap(j / max(n - 1, 1))
        offset = 1 - j * spread
        axes[0, 0].plot(t, norm[:, j] - j * spread, ".", ms=1 if long_visit else 3, color=colour,
                        alpha=0.4 if long_visit else 1.0)
        if long_visit:
            tb, yb, _ = binned_points(t, norm[:, j] - j * spread, 100)
            axes[0, 0].plot(tb, yb, "o", ms=3, color=colour)
        axes[0, 0].text(t[-1], offset, f" {channels['wave_mid'][j]:.3f}" + (" dim" if dim[j] else ""),
                        fontsize=7, va="center", color="0.4" if dim[j] else "k")
    axes[0, 0].set_xlabel("hours since the first exposure")
    axes[0, 0].set_ylabel("flux / channel median, offset per channel")
    axes[0, 0].set_title("channel light curves (labels: centre, um)", fontsize=10)

    ax = axes[0, 1]
    w = np.asarray(lc["white_flux"], float)
    e = np.asarray(lc["white_error"], float)
    wmask = np.asarray(lc["white_mask"], bool)
    wmed = np.nanmedian(w[~wmask]) if np.any(~wmask) else np.nan
    direction = np.asarray(lc["scan_direction"])
    for d, label, colour in ((1, "forward scans", "tab:blue"), (-1, "reverse scans", "tab:red"),
                             (0, "exposures", "k")):
        sel = (direction == d) & ~wmask
        if np.any(sel):
            if long_visit:
                ax.plot(t[sel], w[sel] / wmed, ".", ms=1, color=colour, alpha=0.3, label=label)
            else:
                ax.errorbar(t[sel], w[sel] / wmed, e[sel] / wmed, fmt=".", ms=3, color=colour,
                            label=label)
    if long_visit:
        tb, yb, yeb = binned_points(t[~wmask], w[~wmask] / wmed, 100)
        ax.errorbar(tb, yb, yeb, fmt="o", ms=3, color="k", label="binned (100 bins)")
    ax.set_xlabel("hours since the first exposure")
    ax.set_ylabel("white flux / median")
    ax.set_title("white light curve", fontsize=10)
    ax.legend(fontsize=7)

    ax = axes[0, 2]
    if spectrum is not None:
        mid = 0.5 * (np.asarray(spectrum["wave_lo"], float) + np.asarray(spectrum["wave_hi"], float))
        ax.plot(mid, spectrum["flux"], color="k", lw=1, label="median spectrum")
    for j in range(len(channels)):
        ax.axvspan(channels["wave_lo"][j], channels["wave_hi"][j],
                   color="0.6" if dim[j] else cmap(j / max(n - 1, 1)), alpha=0.25, lw=0,
                   label=("dim channel" if dim[j] and not np.any(dim[:j]) else
                          "channel" if j == int(np.argmin(dim)) and not dim[j] else None))
    for j in range(len(channels)):
        ax.axvline(channels["wave_lo"][j], color="0.5", lw=0.5)
        ax.text(channels["wave_mid"][j], 1.0, str(j), transform=ax.get_xaxis_transform(),
                ha="center", va="bottom", fontsize=7, color="0.4" if dim[j] else "k")
    if len(channels):
        ax.axvline(channels["wave_hi"][len(channels) - 1], color="0.5", lw=0.5)
    if lit is not None:
        for x in lit:
            ax.axvline(x, color="tab:red", ls=":", lw=1)
        ax.plot([], [], color="tab:red", ls=":", label="lit part of the spectrum")
    ax.set_xlabel("wavelength (um)")
    ax.set_ylabel("electrons per pixel")
    ax.set_title("channels (numbered) on the median spectrum", fontsize=10, pad=14)
    ax.legend(fontsize=7)
    return save_figure(fig, path)


def detrend_figure(*args, **kwargs):
    """The white-band fit and the depth spectrum (:func:`.figures_detrend.detrend_figure`)."""
    from .figures_detrend import detrend_figure as draw

    return draw(*args, **kwargs)


def detrend_channels_figure(*args, **kwargs):
    """Every channel's fit (:func:`.figures_detrend.detrend_channels_figure`)."""
    from .figures_detrend import detrend_channels_figure as draw

    return draw(*args, **kwargs)


# ---------------------------------------------------------------------------
# comparing entries of one stage (the notebook page)
# ---------------------------------------------------------------------------

def _made_from(folder):
    import json
    from pathlib import Path

    folder = Path(folder)
    try:
        entry = json.loads((folder / "entry.json").read_text(encoding="utf-8"))
        return folder.parent / entry["made_from"]
    except (OSError, ValueError, KeyError, TypeError):
        return None


def _dim_channels(bin_folder):
    """The ``dim`` flags of a bin entry's channels, or None."""
    from pathlib import Path

    from astropy.io import fits

    try:
        with fits.open(Path(bin_folder) / "lightcurves.fits", memmap=False) as hdul:
            data = hdul["CHANNELS"].data
            return np.asarray(data["dim"], bool) if "dim" in data.names else None
    except (OSError, KeyError, TypeError):
        return None


def stage_spectrum(stage, folder):
    """The spectrum an entry of ``stage`` yields, for comparing entries; None if it has none.

    Returns
    -------
    dict or None
        ``x``, ``y``, ``yerr`` (or None), ``lit`` (bool per point: True where the
        point has light), ``xlabel``, ``ylabel``: the depth spectrum of a detrend
        entry (ppm, channels only), the median spectrum of a bin entry (electrons
        per pixel), the reference spectrum of an extract entry (electrons per
        column).
    """
    from pathlib import Path

    from astropy.io import fits

    folder = Path(folder)
    try:
        if stage == "detrend":
            with fits.open(folder / "detrended.fits", memmap=False) as hdul:
                d = hdul["DEPTHS"].data
                chan = np.asarray(d["channel"]) >= 0
                x = np.asarray(d["wave_mid"], float)[chan]
                y = np.asarray(d["depth"], float)[chan] * 1e6
                e = np.asarray(d["depth_error"], float)[chan] * 1e6
            dim = _dim_channels(_made_from(folder)) if _made_from(folder) else None
            lit = ~dim if dim is not None and dim.size == x.size else np.ones(x.size, bool)
            return {"x": x, "y": y, "yerr": e, "lit": lit, "xlabel": "wavelength (um)",
                    "ylabel": "depth (ppm)"}
        if stage == "bin":
            with fits.open(folder / "lightcurves.fits", memmap=False) as hdul:
                s = hdul["SPECTRUM"].data
                x = 0.5 * (np.asarray(s["wave_lo"], float) + np.asarray(s["wave_hi"], float))
                y = np.asarray(s["flux"], float)
            return {"x": x, "y": y, "yerr": None, "lit": np.ones(x.size, bool),
                    "xlabel": "wavelength (um)", "ylabel": "median spectrum (electrons per pixel)"}
        if stage == "extract":
            with fits.open(folder / "reference.fits", memmap=False) as hdul:
                s = hdul["REFSPEC"].data
                x = np.asarray(s["wavelength"], float)
                y = np.asarray(s["flux"], float)
            order = np.argsort(x)
            return {"x": x[order], "y": y[order], "yerr": None, "lit": np.ones(x.size, bool),
                    "xlabel": "wavelength (um)",
                    "ylabel": "reference spectrum (electrons per column)"}
    except (OSError, KeyError, TypeError, ValueError):
        return None
    return None


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


def overlay_png(stage, entries, *, dpi=90):
    """PNG bytes of the spectra of several entries of one stage overlaid, or None.

    Parameters
    ----------
    stage : str
        ``extract``, ``bin`` or ``detrend`` (other stages have no spectrum).
    entries : sequence of (str, path-like)
        A label (the folder name, say) and the entry's folder, newest last.
    dpi : int

    Returns
    -------
    bytes or None
        None when fewer than two entries yield a spectrum.  Error bars are drawn
        for depths; the y axis is scaled on the points that have light (dim
        channels may run off it, marked by their arrows at the edge).
    """
    import io

    series = [(label, stage_spectrum(stage, folder)) for label, folder in entries]
    series = [(label, s) for label, s in series if s is not None and np.size(s["x"])]
    if len(series) < 2:
        return None
    fig, axes = _figure(1, 1, (9, 4.5), left=0.1, right=0.7, bottom=0.13, top=0.9)
    ax = axes[0, 0]
    colours = plt.get_cmap("tab10")
    spans = []
    for k, (label, s) in enumerate(series):
        colour = colours(k % 10)
        shift = 0.0
        if s["yerr"] is not None:
            step = np.nanmedian(np.diff(s["x"])) if s["x"].size > 1 else 0.0
            shift = (k - 0.5 * (len(series) - 1)) * 0.08 * (step if np.isfinite(step) else 0.0)
            ax.errorbar(s["x"] + shift, s["y"], s["yerr"], fmt="o", ms=4, capsize=2,
                        color=colour, label=label)
            if np.any(~s["lit"]):
                ax.plot((s["x"] + shift)[~s["lit"]], s["y"][~s["lit"]], "x", color="0.5")
        else:
            ax.plot(s["x"], s["y"], lw=1, color=colour, label=label)
        limits = _limits(s["y"], s["yerr"], s["lit"])
        if limits:
            spans.append(limits)
    if spans:
        ax.set_ylim(min(a for a, _ in spans), max(b for _, b in spans))
    ax.set_xlabel(series[0][1]["xlabel"])
    ax.set_ylabel(series[0][1]["ylabel"])
    ax.set_title(f"{stage}: the {len(series)} entries compared"
                 + (" (x: dim channels)" if any(np.any(~s["lit"]) for _, s in series) else ""),
                 fontsize=10)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    buffer = io.BytesIO()
    try:
        fig.savefig(buffer, format="png", dpi=dpi)
    finally:
        plt.close(fig)
    return buffer.getvalue()


def grid_figure(path, names, weight, depth, error, wave_mid, value, value_error, kind,
                criterion="bic"):
    """The model grid: white-light weights per model, and every model's spectrum.

    ``weight``, ``depth``, ``error`` have shape (n_models, 1 + n_channels)
    (white light first); each model's spectrum is drawn with an opacity that
    grows with its mean channel weight, the marginalised spectrum in black.
    ``criterion`` names the information criterion behind the weights.
    """
    fig, axes = plt.subplots(1, 2, figsize=(14, 0.9 + 0.28 * max(len(names), 6)), layout=None)
    fig.subplots_adjust(left=0.27, right=0.98, bottom=0.12, top=0.93, wspace=0.25)
    y = np.arange(len(names))
    axes[0].barh(y, weight[:, 0], color="tab:blue", label="white light")
    axes[0].plot(np.mean(weight[:, 1:], axis=1), y, "o", color="tab:orange",
                 label="channels (mean)")
    axes[0].set_yticks(y, names, fontsize=7)
    axes[0].invert_yaxis()
    axes[0].set_xlim(0, 1)
    axes[0].set_xlabel(f"weight ({criterion.upper()})")
    axes[0].set_title("weight of each systematics model", fontsize=9)
    axes[0].legend(fontsize=8, loc="lower right")
    scale = 1e6
    mean_w = np.mean(weight[:, 1:], axis=1)
    drawn = False
    for m in range(len(names)):
        if np.all(np.isfinite(depth[m, 1:])):
            axes[1].plot(wave_mid, depth[m, 1:] * scale, "-", color="tab:gray",
                         alpha=float(0.15 + 0.85 * mean_w[m]), lw=1,
                         label=None if drawn else "each model (darker: more weight)")
            drawn = True
    axes[1].errorbar(wave_mid, value[1:] * scale, value_error[1:] * scale, fmt="o", color="k",
                     label="marginalised")
    axes[1].set_xlabel("wavelength (um)")
    axes[1].set_ylabel(f"{kind} depth (ppm)")
    axes[1].set_title("depth spectrum of each model and marginalised over them", fontsize=9)
    axes[1].legend(fontsize=8)
    return save_figure(fig, path)
