"""Comparing entries of one stage on the notebook page: their spectra overlaid in one figure.

:func:`stage_spectrum` reads the spectrum an entry yields (a detrend entry's
depths, a bin entry's median spectrum, an extract entry's reference
spectrum); :func:`overlay_png` draws several entries' spectra over each
other (PNG bytes for the page, :mod:`.notebookpage`).
"""

import numpy as np

from .figurekit import _figure, _limits, plt

__all__ = ["stage_spectrum", "overlay_png"]


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
