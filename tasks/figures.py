"""Diagnostic figures of each stage (PNG, written through :func:`products.save_figure`).

What every figure shares lives in :mod:`.figurekit`, the detrend stage's fits
in :mod:`.figures_detrend`, the page's overlay of entries in
:mod:`.figures_overlay`; their public names are re-exported here.
"""

import numpy as np

from lightledger.pipeline import mask as dq

# what every figure shares, and the page's overlay of entries, re-exported here so that
# ``from lightledger.tasks.figures import NAME`` keeps working
from .figurekit import (LONG_VISIT, MAX_ROWS, _FLAG_COLOURS, _figure, _hatch_rows,  # noqa: F401
                        _hours, _image, _limits, _pixel_axes, _shade_rows, binned_points,
                        decimate_rows, flag_image, plt)
from .figures_overlay import _dim_channels, _made_from, overlay_png, stage_spectrum  # noqa: F401
from .products import save_figure

__all__ = ["calibrate_figure", "extract_figure", "bin_figure", "detrend_figure",
           "detrend_channels_figure", "flag_image",
           "binned_points", "decimate_rows", "stage_spectrum", "overlay_png"]


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
