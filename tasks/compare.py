"""Comparing two notebook entries or two products.

``compare(A, B)`` takes two stage folders (entries) or two product files of
the same kind and returns printable lines: the parameter differences, then
the numerical differences that matter for the light curves:

* white-light rms (ppm) of each (point-to-point scatter for a bin product,
  fit residuals for a detrend product);
* depths per channel and their difference in units of the combined error
  (detrend products);
* light-curve differences, per channel, in units of their errors: the
  median and the largest ``|a - b| / sqrt(err_a**2 + err_b**2)`` over the
  exposures (bin and detrend products).
"""

import json
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.errors import InputFileError

from .base import ENTRY_NAME
from .notebook import parameter_changes
from .products import read_provenance

__all__ = ["compare", "main_product"]

_MAIN = ("detrended.fits", "lightcurves.fits", "spectra.fits", "exposures.ecsv")


def main_product(folder):
    """The product of a stage folder that :func:`compare` reads."""
    for name in _MAIN:
        if (Path(folder) / name).is_file():
            return Path(folder) / name
    raise InputFileError(f"{folder}: no product to compare in this folder")


def _entry(folder):
    try:
        return json.loads((Path(folder) / ENTRY_NAME).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputFileError(f"{folder}: not a complete notebook entry (no {ENTRY_NAME})") from None
    except json.JSONDecodeError as exc:
        raise InputFileError(f"{folder}/{ENTRY_NAME}: not valid JSON ({exc})") from None


def _describe(path):
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: no such entry or product")
    if path.is_dir():
        entry = _entry(path)
        return entry["stage"], entry["params"], main_product(path), path.name
    prov = read_provenance(path)
    if not prov:
        raise InputFileError(f"{path}: not a lightledger product (no provenance)")
    return prov["stage"], prov["params"], path, f"{path.parent.name}/{path.name}"


def _white_rms(table, kind):
    if kind == "DETRENDED":
        use = np.asarray(table["used"], bool)
        r = np.asarray(table["white_residual"], float)[use]
        return float(np.sqrt(np.mean(r ** 2)) * 1e6)
    f = np.asarray(table["white_flux"], float)
    f = f[np.isfinite(f)] / np.nanmedian(f)
    return float(np.std(np.diff(f)) / np.sqrt(2) * 1e6)


def _series(table, kind):
    if kind == "DETRENDED":
        return (np.asarray(table["detrended"], float), np.asarray(table["detrended_error"], float),
                np.asarray(table["white_detrended"], float),
                np.asarray(table["white_detrended_error"], float))
    return (np.asarray(table["flux"], float), np.asarray(table["error"], float),
            np.asarray(table["white_flux"], float), np.asarray(table["white_error"], float))


def compare(a, b):
    """Lines describing how entry or product ``b`` differs from ``a``."""
    stage_a, params_a, prod_a, label_a = _describe(a)
    stage_b, params_b, prod_b, label_b = _describe(b)
    lines = [f"A: {label_a} ({stage_a})", f"B: {label_b} ({stage_b})"]
    if stage_a != stage_b:
        lines.append("the two come from different stages; only their parameters are compared")
    changes = parameter_changes(params_a, params_b)
    if changes:
        lines.append("parameters that differ:")
        lines += [f"  {k}: {_fmt(v[0])} -> {_fmt(v[1])}" for k, v in changes.items()]
    else:
        lines.append("parameters: identical")
    if stage_a != stage_b or prod_a.suffix != ".fits" or prod_b.suffix != ".fits":
        return lines
    with fits.open(prod_a) as ha, fits.open(prod_b) as hb:
        kind = "DETRENDED" if "DETRENDED" in ha else "LIGHTCURVES" if "LIGHTCURVES" in ha else None
        if kind is None or kind not in hb:
            return lines
        ta, tb = Table(ha[kind].data), Table(hb[kind].data)
        da = Table(ha["DEPTHS"].data) if "DEPTHS" in ha else None
        db = Table(hb["DEPTHS"].data) if "DEPTHS" in hb else None
    lines.append(f"white-light rms: {_white_rms(ta, kind):.1f} ppm -> {_white_rms(tb, kind):.1f} ppm")
    if da is not None and db is not None and len(da) == len(db):
        lines.append("depths (ppm): channel, wavelength, A, B, difference / combined error")
        for ra, rb in zip(da, db):
            err = np.hypot(ra["depth_error"], rb["depth_error"])
            label = "white" if ra["channel"] < 0 else f"{ra['channel']:>5d}"
            lines.append(f"  {label:>5}  {ra['wave_mid']:.4f} um  {ra['depth'] * 1e6:9.1f} "
                         f"{rb['depth'] * 1e6:9.1f}  {(rb['depth'] - ra['depth']) / err:+.2f}")
    if len(ta) == len(tb):
        fa, ea, wa, wea = _series(ta, kind)
        fb, eb, wb, web = _series(tb, kind)
        if fa.shape == fb.shape:
            with np.errstate(invalid="ignore", divide="ignore"):
                z = np.abs(fb - fa) / np.hypot(ea, eb)
                zw = np.abs(wb - wa) / np.hypot(wea, web)
            lines.append("light-curve differences in units of their errors (median, largest):")
            lines.append(f"  white  {np.nanmedian(zw):.3f}  {np.nanmax(zw):.3f}")
            for j in range(fa.shape[1]):
                lines.append(f"  {j:>5d}  {np.nanmedian(z[:, j]):.3f}  {np.nanmax(z[:, j]):.3f}")
    else:
        lines.append(f"the light curves have different lengths ({len(ta)} and {len(tb)} exposures)")
    return lines


def _fmt(value):
    if isinstance(value, list):
        return "[" + ", ".join(str(v) for v in value) + "]"
    return str(value)
