"""The numbers of two products compared, table by table (the third part of ``lightledger compare``).

Every table the two products share: depths (A, B and their difference in
units of the combined error), a phase curve's planet quantities, light
curves (out-of-event and point-to-point scatter, differences in units of
their errors), spectra (per-pixel differences in units of their errors,
over all exposures and in ten wavelength ranges) and, for any other table,
the largest difference of each numeric column.  See :mod:`.compare`.
"""

import json
import warnings
from pathlib import Path

import numpy as np

__all__ = ["out_of_event"]


def _read(path):
    """(tables by name, images by name) of a FITS or ECSV product."""
    from astropy.io import fits
    from astropy.table import Table

    path = Path(path)
    tables, images = {}, {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if path.suffix == ".ecsv":
            table = Table.read(path, format="ascii.ecsv")
            tables[_ecsv_kind(path, table)] = _narrow(table)
            return tables, images
        with fits.open(path, memmap=False) as hdul:
            for hdu in hdul[1:]:
                if hdu.name == "PROVENANCE" or hdu.data is None:
                    continue
                if isinstance(hdu, fits.BinTableHDU):
                    tables[hdu.name] = Table(hdu.data)
                else:
                    images[hdu.name] = np.asarray(hdu.data)
    return tables, images


def _ecsv_kind(path, table):
    names = set(table.colnames)
    if {"depth", "depth_error"} <= names:
        return "DEPTHS"
    if "white_detrended" in names:
        return "DETRENDED"
    if "white_flux" in names:
        return "LIGHTCURVES"
    return Path(path).stem.upper()


def _narrow(table):
    """A wide ECSV light-curve table (flux_00, flux_01, ...) with 2-D columns again."""
    from astropy.table import Table

    out, groups = Table(), {}
    for name in table.colnames:
        stem, _, number = name.rpartition("_")
        if stem and number.isdigit() and len(number) == 2:
            groups.setdefault(stem, []).append(name)
        else:
            out[name] = table[name]
    for stem, names in groups.items():
        out[stem] = np.column_stack([np.asarray(table[n]) for n in sorted(names)])
    return out


def _numbers(a, b):
    try:
        tables_a, images_a = _read(a.product)
        tables_b, images_b = _read(b.product)
    except Exception as exc:
        return [f"numbers: a product is unreadable ({type(exc).__name__}: {exc})"]
    out = []
    common = [n for n in tables_a if n in tables_b]
    if not common and not ({"FLUX", "VARIANCE"} <= set(images_a) & set(images_b)):
        return out + [f"numbers: {a.product.name} and {b.product.name} share no table to compare"]
    if "DEPTHS" in common:
        out += _depths(tables_a["DEPTHS"], tables_b["DEPTHS"])
    if "PLANET" in common:
        out += _planet(tables_a["PLANET"], tables_b["PLANET"])
    for kind in ("DETRENDED", "LIGHTCURVES"):
        if kind in common:
            out += _light_curves(tables_a[kind], tables_b[kind], kind, a.event() or b.event())
    if {"FLUX", "VARIANCE"} <= set(images_a) & set(images_b):
        wave = tables_a.get("WAVELENGTH")
        out += _spectra(images_a, images_b, wave)
    for name in common:
        if name in ("DEPTHS", "DETRENDED", "LIGHTCURVES", "PLANET"):
            continue
        out += _generic(name, tables_a[name], tables_b[name])
    return out


def _depths(da, db):
    out = ["depths (ppm): channel, wavelength, A, B, difference / combined error"]
    rows_b = {int(r["channel"]): r for r in db}
    for ra in da:
        rb = rows_b.get(int(ra["channel"]))
        label = "white" if ra["channel"] < 0 else f"{int(ra['channel']):>5d}"
        if rb is None:
            out.append(f"  {label:>5}  only in A")
            continue
        err = float(np.hypot(ra["depth_error"], rb["depth_error"]))
        z = (rb["depth"] - ra["depth"]) / err if err > 0 else np.nan
        wave = f"{float(ra['wave_mid']):.4f} um" if "wave_mid" in da.colnames else ""
        out.append(f"  {label:>5}  {wave}  {ra['depth'] * 1e6:9.1f} {rb['depth'] * 1e6:9.1f}  {z:+.2f}")
    if len(db) != len(da):
        out.append(f"  the depth tables have {len(da)} and {len(db)} rows")
    return out


#: Planet quantities of a phase-curve product compared (column, error column, scale, unit).
_PLANET = (("transit_depth", "transit_depth_error", 1e6, "ppm"),
           ("eclipse_depth", "eclipse_depth_error", 1e6, "ppm"),
           ("night_flux", "night_flux_error", 1e6, "ppm"),
           ("amplitude", "amplitude_error", 1e6, "ppm"),
           ("offset_deg", "offset_error_deg", 1.0, "deg"))


def _planet(pa, pb):
    """Per channel, each planet quantity of A and B and their difference / combined error."""
    out = ["planet (phase-curve fit): channel, quantity: A -> B (difference / combined error)"]
    rows_b = {int(r["channel"]): r for r in pb}
    for ra in pa:
        rb = rows_b.get(int(ra["channel"]))
        label = "white" if ra["channel"] < 0 else f"{int(ra['channel']):>5d}"
        if rb is None:
            out.append(f"  {label:>5}  only in A")
            continue
        parts = []
        for col, ecol, scale, unit in _PLANET:
            if col not in pa.colnames or col not in pb.colnames:
                continue
            a, b = float(ra[col]), float(rb[col])
            if not (np.isfinite(a) or np.isfinite(b)):
                continue
            err = float(np.hypot(ra[ecol], rb[ecol])) if ecol in pa.colnames else np.nan
            z = (b - a) / err if err > 0 else np.nan
            parts.append(f"{col} {a * scale:.1f} -> {b * scale:.1f} {unit} ({z:+.2f})")
        out.append(f"  {label:>5}  " + "; ".join(parts))
    return out


def _series(table, kind):
    """[(label, flux, error, usable)] of the white band and each channel."""
    n = len(table)
    if kind == "DETRENDED":
        used = np.asarray(table["used"], bool) if "used" in table.colnames else np.ones(n, bool)
        white = ("white", np.asarray(table["white_detrended"], float),
                 np.asarray(table["white_detrended_error"], float), used)
        flux = np.asarray(table["detrended"], float)
        err = np.asarray(table["detrended_error"], float)
        masks = np.broadcast_to(~used[:, None], flux.shape) if flux.ndim == 2 else ~used
    else:
        good = ~np.asarray(table["white_mask"], bool) if "white_mask" in table.colnames \
            else np.ones(n, bool)
        if "flux_outlier" in table.colnames:
            good &= ~np.asarray(table["flux_outlier"], bool)
        white = ("white", np.asarray(table["white_flux"], float),
                 np.asarray(table["white_error"], float), good)
        flux = np.asarray(table["flux"], float)
        err = np.asarray(table["error"], float)
        masks = np.asarray(table["mask"], bool) if "mask" in table.colnames else np.zeros(flux.shape, bool)
        if flux.ndim == 2 and "flux_outlier" in table.colnames:
            masks = masks | np.asarray(table["flux_outlier"], bool)[:, None]
    out = [white]
    if flux.ndim == 2:
        for j in range(flux.shape[1]):
            out.append((f"{j:>5d}", flux[:, j], err[:, j], ~np.asarray(masks)[:, j]))
    return out


def out_of_event(time, event):
    """True for exposures outside the event (first to fourth contact) of an ephemeris.

    Parameters
    ----------
    time : ndarray, BJD_TDB (d)
    event : dict with kind, t0, period, duration (d)
    """
    time = np.asarray(time, float)
    if not event or not all(k in event for k in ("t0", "period", "duration")):
        return np.ones(time.shape, bool)
    mid = float(event["t0"]) + (0.5 * float(event["period"]) if event.get("kind") == "eclipse" else 0.0)
    phase = (time - mid + 0.5 * float(event["period"])) % float(event["period"]) - 0.5 * float(event["period"])
    return np.abs(phase) > 0.5 * float(event["duration"])


def _scatter(flux, usable, out):
    """Out-of-event scatter and point-to-point scatter (ppm) of a series normalised by its median."""
    keep = usable & np.isfinite(flux)
    base = keep & out
    if base.sum() < 3:
        return np.nan, np.nan
    f = flux / np.median(flux[base])
    ooe = float(np.std(f[base], ddof=1) * 1e6)
    g = np.diff(f[keep])
    # robust: 1.4826 x the median absolute deviation of successive differences, over sqrt(2), so
    # that the event's ingress and the gaps between orbits do not count (common practice)
    p2p = float(1.4826 * np.median(np.abs(g - np.median(g))) / np.sqrt(2) * 1e6) if g.size > 2 \
        else np.nan
    return ooe, p2p


def _light_curves(ta, tb, kind, event):
    what = "detrended light curves" if kind == "DETRENDED" else "light curves"
    time_a = np.asarray(ta["time_bjd_tdb"], float) if "time_bjd_tdb" in ta.colnames else np.arange(len(ta))
    time_b = np.asarray(tb["time_bjd_tdb"], float) if "time_bjd_tdb" in tb.colnames else np.arange(len(tb))
    out_a, out_b = out_of_event(time_a, event), out_of_event(time_b, event)
    where = ("out of the event (first to fourth contact of the visit's ephemeris)" if event
             else "over every exposure (the event's ephemeris is unknown here)")
    lines = [f"{what}: scatter {where}, and point-to-point scatter (ppm), A -> B"]
    series_a, series_b = _series(ta, kind), _series(tb, kind)
    for (label, fa, ea, ua), (_, fb, eb, ub) in zip(series_a, series_b):
        sa, pa = _scatter(fa, ua, out_a)
        sb, pb = _scatter(fb, ub, out_b)
        lines.append(f"  {label:>5}  out of event {sa:8.1f} -> {sb:8.1f}   point-to-point "
                     f"{pa:8.1f} -> {pb:8.1f}")
    if len(series_a) != len(series_b):
        lines.append(f"  A has {len(series_a) - 1} channels and B {len(series_b) - 1}")
    same_times = len(time_a) == len(time_b) and np.allclose(time_a, time_b, rtol=0, atol=1e-6,
                                                             equal_nan=True)
    if not same_times:
        lines.append(f"  the light curves have different exposures ({len(time_a)} and {len(time_b)}); "
                     f"no exposure-by-exposure difference")
        return lines
    lines.append(f"{what}: A - B per exposure in units of their combined error (median, largest)")
    for (label, fa, ea, ua), (_, fb, eb, ub) in zip(series_a, series_b):
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.abs(fb - fa) / np.hypot(ea, eb)
        z = z[ua & ub & np.isfinite(z)]
        if z.size:
            lines.append(f"  {label:>5}  {np.median(z):.3f}  {np.max(z):.3f}")
    return lines


def _spectra(ia, ib, wave):
    fa, fb = np.asarray(ia["FLUX"], float), np.asarray(ib["FLUX"], float)
    if fa.shape != fb.shape:
        return [f"spectra: shapes differ ({fa.shape} and {fb.shape}); no pixel-by-pixel difference"]
    va, vb = np.asarray(ia["VARIANCE"], float), np.asarray(ib["VARIANCE"], float)
    bad = np.zeros(fa.shape, bool)
    for images in (ia, ib):
        if "MASK" in images:
            bad |= np.asarray(images["MASK"]) > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.abs(fb - fa) / np.sqrt(va + vb)
    z = np.where(bad | ~np.isfinite(z), np.nan, z)
    lines = ["spectra: A - B per exposure and pixel in units of their combined error "
             "(median, 95th percentile, largest)"]
    flat = z[np.isfinite(z)]
    if not flat.size:
        return lines + ["  no pixel usable in both"]
    lines.append(f"  all     {np.median(flat):.3f}  {np.percentile(flat, 95):.3f}  {np.max(flat):.3f}")
    edges = np.linspace(0, fa.shape[-1], 11).astype(int)
    w = np.asarray(wave["wavelength"], float) if wave is not None and "wavelength" in wave.colnames \
        else None
    for lo, hi in zip(edges[:-1], edges[1:]):
        part = z[..., lo:hi]
        part = part[np.isfinite(part)]
        if not part.size:
            continue
        label = f"{w[lo]:.3f}-{w[hi - 1]:.3f} um" if w is not None else f"pixels {lo}-{hi - 1}"
        lines.append(f"  {label}  {np.median(part):.3f}  {np.percentile(part, 95):.3f}  "
                     f"{np.max(part):.3f}")
    return lines


def _generic(name, ta, tb):
    if len(ta) != len(tb):
        return [f"{name.lower()}: {len(ta)} and {len(tb)} rows"]
    diffs = []
    for col in ta.colnames:
        if col not in tb.colnames:
            continue
        xa, xb = np.asarray(ta[col]), np.asarray(tb[col])
        if xa.shape != xb.shape or xa.dtype.kind not in "fiub" or xb.dtype.kind not in "fiub":
            continue
        with np.errstate(invalid="ignore"):
            d = np.abs(xa.astype(float) - xb.astype(float))
        d = d[np.isfinite(d)]
        if d.size and d.max() > 0:
            diffs.append(f"{col} {d.max():.4g}")
    if not diffs:
        return [f"{name.lower()}: every numeric column equal"]
    return [f"{name.lower()}: largest differences: " + ", ".join(diffs)]


def _fmt(value):
    if isinstance(value, list):
        return "[" + ", ".join(_fmt(v) for v in value) + "]"
    return json.dumps(value) if isinstance(value, str) else str(value)
