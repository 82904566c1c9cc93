"""Diagnostic figures of each stage (PNG, written through :func:`products.save_figure`)."""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from lightledger.pipeline import mask as dq  # noqa: E402

from .products import save_figure  # noqa: E402

__all__ = ["calibrate_figure", "extract_figure", "bin_figure", "detrend_figure"]


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
