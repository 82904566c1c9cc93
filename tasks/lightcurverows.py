"""Rows of the LIGHTCURVES table for every exposure of the visit, set-aside ones included.

The bin stage reduces the usable exposures; :func:`with_set_aside` gives
every other exposure of the inventory its row (times from its header, NaN
fluxes, masks True, the reason it was set aside).  A stage that fits the
light curves takes :func:`usable_rows` first, and completes a table made per
reduced exposure with :func:`set_aside_rows`.
"""

from pathlib import Path

import numpy as np
from astropy.table import Table

from lightledger.pipeline.timing import interpolated_barycentric_times

from .lightcurvecolumns import SET_ASIDE_COLUMNS

__all__ = ["usable_rows", "expand_rows", "set_aside_rows", "with_set_aside"]


def usable_rows(lc):
    """True for the rows of exposures that were reduced; False for those set aside at input."""
    if "set_aside" not in lc.colnames:
        return np.ones(len(lc), bool)
    return ~np.asarray(lc["set_aside"], bool)


def _fill_value(dtype):
    if dtype.kind == "f":
        return np.nan
    if dtype.kind == "b":
        return False
    if dtype.kind in "iu":
        return -1
    return ""


def expand_rows(table, keep):
    """``table`` (one row per True of ``keep``) with a row at every position of ``keep``.

    Rows where ``keep`` is False are filled with NaN (floats), False (booleans),
    -1 (integers) or '' (strings); units and descriptions are kept.
    """
    keep = np.asarray(keep, bool)
    if int(keep.sum()) != len(table):
        raise ValueError(f"expand_rows: {len(table)} rows for {int(keep.sum())} kept positions")
    out = Table(meta=table.meta)
    for name in table.colnames:
        col = table[name]
        values = np.asarray(col)
        full = np.full((keep.size,) + values.shape[1:], _fill_value(values.dtype),
                       dtype=values.dtype if values.dtype.kind != "U" else values.dtype)
        full[keep] = values
        out[name] = full
        out[name].unit = col.unit
        out[name].description = col.description
    return out


def set_aside_rows(lc, full_lc):
    """``lc`` (the rows fitted) with the set-aside rows of ``full_lc`` filled in.

    For tables made per reduced exposure (detrended light curves): the result
    has one row per exposure of ``full_lc``, the set-aside ones with their
    ``exposure`` number and time, NaN values and ``used`` False where present.
    """
    keep = usable_rows(full_lc)
    if keep.all():
        return lc
    out = expand_rows(lc, keep)
    for name in ("exposure", "time_bjd_tdb", "exposure_time"):
        if name in out.colnames and name in full_lc.colnames:
            out[name] = np.asarray(full_lc[name], np.asarray(out[name]).dtype)
            out[name].unit = lc[name].unit
            out[name].description = lc[name].description
    return out


def _set_aside_times(refs, target):
    """Mid-exposure MJD (UTC) and BJD_TDB of set-aside exposures whose start is known.

    The mid time is the start plus the mean time of the reads after the zero
    read (all of them: which reads a ramp would have used is not known), or
    half the exposure time; NaN where the start is unknown.
    """
    mid = np.full(len(refs), np.nan)
    for i, r in enumerate(refs):
        reads = np.asarray(r.read_times, float)
        offset = (float(np.mean(reads[1:])) if reads.size >= 2 and np.all(np.isfinite(reads))
                  else 0.5 * r.exposure_time if np.isfinite(r.exposure_time) and r.exposure_time > 0
                  else np.nan)
        mid[i] = r.start_mjd + offset / 86400.0
    bjd = np.full(len(refs), np.nan)
    ok = np.isfinite(mid)
    if ok.any():
        geo = np.array([r.obsgeo if r.obsgeo is not None else (np.nan,) * 3 for r in refs],
                       float).reshape(len(refs), 3)[ok]
        # the geocentre where a position is unknown, as for the reduced exposures
        obsgeo = None if np.all(np.isnan(geo)) else np.where(np.isnan(geo), 0.0, geo)
        bjd[ok] = interpolated_barycentric_times(mid[ok], target["ra"], target["dec"],
                                                 obsgeo_m=obsgeo).bjd_tdb
    return mid, bjd


def with_set_aside(lc, inventory, target):
    """LIGHTCURVES of the reduced exposures, completed with a row for every set-aside one.

    Parameters
    ----------
    lc : astropy Table
        One row per reduced exposure (``exposure`` numbers of the inventory).
    inventory : list of rawio.ExposureRef
        Every exposure of the visit, in exposure-number order.
    target : dict
        ``ra``, ``dec`` (deg) for the barycentric times of the set-aside rows.

    Returns
    -------
    astropy Table
        One row per exposure of the inventory, in exposure order, with the
        columns ``file``, ``file_index``, ``set_aside`` and ``reason`` added;
        a set-aside row has its times (when its start is known), its
        exposure time, NaN fluxes and covariates, masks True, ``orbit`` -1
        and ``scan_direction`` from its header.
    """
    numbers = np.array([r.exposure for r in inventory], np.int64)
    position = {int(n): i for i, n in enumerate(numbers)}
    rows = np.array([position[int(n)] for n in np.asarray(lc["exposure"])], np.int64)
    keep = np.zeros(len(inventory), bool)
    keep[rows] = True
    if not np.all(np.diff(rows) > 0):
        raise ValueError("with_set_aside: the reduced exposures are not in inventory order")
    full = expand_rows(lc, keep)
    aside = [r for r, k in zip(inventory, keep) if not k]
    where = ~keep
    full["exposure"] = numbers
    if aside:
        mid, bjd = _set_aside_times(aside, target)
        full["time_mjd_utc"][where] = mid
        full["time_bjd_tdb"][where] = bjd
        texp = np.array([r.exposure_time for r in aside], float)
        full["exposure_time"][where] = np.where(np.isfinite(texp) & (texp > 0), texp, np.nan)
        full["white_mask"][where] = True
        full["mask"][where] = True
        full["n_filled"][where] = 0
        full["scan_direction"][where] = [int(np.sign(r.scan_velocity))
                                         if np.isfinite(r.scan_velocity) else 0 for r in aside]
    full["file"] = [Path(r.file).name for r in inventory]
    full["file_index"] = np.array([r.index for r in inventory], np.int64)
    full["set_aside"] = where
    full["reason"] = [r.reason if not k else "" for r, k in zip(inventory, keep)]
    for name, (unit, text) in SET_ASIDE_COLUMNS.items():
        full[name].unit = unit or None
        full[name].description = text
    return full
