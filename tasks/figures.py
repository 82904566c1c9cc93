"""Diagnostic figures of each stage (PNG, written through :func:`products.save_figure`)."""

import warnings

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from lightledger.pipeline import mask as dq  # noqa: E402

from .products import save_figure  # noqa: E402

__all__ = ["calibrate_figure", "extract_figure", "bin_figure", "detrend_figure"]


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


def calibrate_figure(path, frame, bits, exposures):
    """A calibrated frame, its mask, background and flagged counts against time."""
    fig, axes = plt.subplots(2, 2, figsize=(11, 7), constrained_layout=True)
    lo, hi = np.nanpercentile(frame, [1, 99.5])
    im = axes[0, 0].imshow(frame, origin="lower", vmin=lo, vmax=hi, aspect="auto", cmap="magma")
    fig.colorbar(im, ax=axes[0, 0], label="electrons")
    axes[0, 0].set_title("calibrated frame (first exposure of the middle chunk)")
    shown = np.zeros(bits.shape, int)
    names = []
    for k, (name, value) in enumerate(dq.FLAGS.items(), start=1):
        if np.any(bits & value):
            shown[(bits & value) > 0] = len(names) + 1
            names.append(name)
    cmap = plt.get_cmap("tab10", max(len(names) + 1, 2))
    axes[0, 1].imshow(shown, origin="lower", aspect="auto", cmap=cmap, vmin=0,
                      vmax=max(len(names), 1), interpolation="nearest")
    axes[0, 1].set_title("mask: " + (", ".join(f"{i + 1}={n}" for i, n in enumerate(names)) or "clean"),
                         fontsize=9)
    t = _hours(exposures["start_mjd_utc"])
    axes[1, 0].plot(t, exposures["background_level"], ".", color="tab:blue")
    axes[1, 0].set_xlabel("hours since the first exposure")
    axes[1, 0].set_ylabel("background level (e- per pixel)")
    for name in dq.FLAGS:
        col = f"n_{name.lower()}"
        if col in exposures.colnames and np.any(exposures[col]):
            axes[1, 1].plot(t, exposures[col], ".", label=name)
    axes[1, 1].set_yscale("symlog")
    axes[1, 1].set_xlabel("hours since the first exposure")
    axes[1, 1].set_ylabel("flagged pixels per exposure")
    if axes[1, 1].get_legend_handles_labels()[0]:
        axes[1, 1].legend(fontsize=8)
    return save_figure(fig, path)


def extract_figure(path, wavelength, flux, exposures, profile_image):
    """Waterfall of normalised spectra, shifts against time, the spatial profile image."""
    fig, axes = plt.subplots(2, 2, figsize=(11, 7), constrained_layout=True)
    n_exposures = len(flux)
    flux, _ = decimate_rows(flux)               # means of consecutive exposures, at most 600 rows
    med = np.nanmedian(flux, axis=0)
    bright = med > 0.2 * np.nanmax(med)           # the faint ends would swamp the colour scale
    ratio = flux / np.where(bright, med, np.nan)
    ratio = ratio / np.nanmedian(ratio, axis=1, keepdims=True)
    lo, hi = np.nanpercentile(ratio[:, bright], [1, 99]) if np.any(bright) else (0.99, 1.01)
    axes[0, 0].imshow(ratio, origin="lower", aspect="auto", cmap="viridis", vmin=lo, vmax=hi,
                      extent=[wavelength[0], wavelength[-1], 0, n_exposures])
    axes[0, 0].set_xlabel("wavelength (um)")
    axes[0, 0].set_ylabel("exposure")
    axes[0, 0].set_title("spectra / median spectrum")
    axes[0, 1].plot(wavelength, med, color="k")
    axes[0, 1].set_xlabel("wavelength (um)")
    axes[0, 1].set_ylabel("median spectrum (e- per pixel)")
    t = _hours(exposures["start_mjd_utc"])
    for name, color in (("dx", "tab:blue"), ("dy", "tab:orange")):
        axes[1, 0].plot(t, exposures[name], ".", color=color, label=name)
    axes[1, 0].set_xlabel("hours since the first exposure")
    axes[1, 0].set_ylabel("shift (pixels)")
    axes[1, 0].legend(fontsize=8)
    im = axes[1, 1].imshow(profile_image, origin="lower", aspect="auto", cmap="magma")
    fig.colorbar(im, ax=axes[1, 1])
    axes[1, 1].set_title("spatial profile (first exposure)")
    return save_figure(fig, path)


def bin_figure(path, lc, channels):
    """Waterfall of normalised channel light curves and the white light curve."""
    fig, axes = plt.subplots(1, 2, figsize=(11, 6), constrained_layout=True)
    t = _hours(lc["time_bjd_tdb"])
    flux = np.asarray(lc["flux"], float)
    norm = flux / np.nanmedian(flux, axis=0)
    spread = 4 * np.nanstd(norm - 1) if np.isfinite(np.nanstd(norm)) else 0.01
    cmap = plt.get_cmap("viridis")
    n = norm.shape[1]
    for j in range(n):
        axes[0].plot(t, norm[:, j] - j * spread, ".", ms=3, color=cmap(j / max(n - 1, 1)))
        axes[0].text(t[-1], 1 - j * spread, f" {channels['wave_mid'][j]:.3f}", fontsize=7, va="center")
    axes[0].set_xlabel("hours since the first exposure")
    axes[0].set_ylabel("normalised flux (offset per channel; label: um)")
    w = np.asarray(lc["white_flux"], float)
    e = np.asarray(lc["white_error"], float)
    med = np.nanmedian(w)
    direction = np.asarray(lc["scan_direction"])
    for d, label, color in ((1, "forward", "tab:blue"), (-1, "reverse", "tab:red"), (0, "stare", "k")):
        sel = direction == d
        if np.any(sel):
            axes[1].errorbar(t[sel], w[sel] / med, e[sel] / med, fmt=".", color=color, label=label)
    axes[1].set_xlabel("hours since the first exposure")
    axes[1].set_ylabel("white flux / median")
    axes[1].legend(fontsize=8)
    return save_figure(fig, path)


def detrend_figure(path, time, white, white_error, white_model, white_systematics, used,
                   wave_mid, depth, depth_error, kind):
    """Raw and detrended white light curve with the fit, and the depth spectrum."""
    fig, axes = plt.subplots(1, 3, figsize=(14, 4.8), constrained_layout=True)
    t = _hours(time)
    med = np.nanmedian(white)
    axes[0].errorbar(t[used], white[used] / med, white_error[used] / med, fmt=".", color="tab:blue",
                     label="fitted")
    if np.any(~used):
        axes[0].plot(t[~used], white[~used] / med, "x", color="0.6", label="left out")
    order = np.argsort(t)
    axes[0].plot(t[order], white_model[order] / med, "_", color="k", ms=8, label="model")
    axes[0].set_xlabel("hours since the first exposure")
    axes[0].set_ylabel("white flux / median")
    axes[0].legend(fontsize=8)
    detr = white / white_systematics
    axes[1].errorbar(t[used], detr[used], white_error[used] / white_systematics[used], fmt=".",
                     color="tab:green")
    axes[1].plot(t[order], (white_model / white_systematics)[order], "_", color="k", ms=8)
    axes[1].set_xlabel("hours since the first exposure")
    axes[1].set_ylabel("detrended white flux")
    scale = 1e6
    axes[2].errorbar(wave_mid, np.asarray(depth) * scale, np.asarray(depth_error) * scale, fmt="o",
                     color="tab:purple")
    axes[2].set_xlabel("wavelength (um)")
    axes[2].set_ylabel(f"{kind} depth (ppm)")
    return save_figure(fig, path)
