"""Bin stage: aligned spectra to channel light curves with times and covariates.

Products in ``NOTEBOOK/bin-IDENT/`` (every column is described in the
README's "Light-curve products" section):

``lightcurves.fits``
    LIGHTCURVES (one row per exposure: times, white and channel fluxes, errors,
    masks, covariates), CHANNELS (edges, centres, pixel counts, mean counts)
    and SPECTRUM (the mean spectrum on the pixel grid);
``lightcurves.ecsv``, ``channels.ecsv``, ``spectrum.ecsv``
    the same tables as ECSV, with one column per channel;
``lightcurves.png``
    a waterfall of the channel light curves and the white light curve.
"""

import time
import warnings
from pathlib import Path

import luigi
import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.binning import (BinnedSpectra, bin_spectra, channel_edges_from_list,
                                          equal_count_channel_edges, uniform_channel_edges)
from lightledger.pipeline.covariates import exposure_covariates
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.lit import channel_light, lit_range
from lightledger.pipeline.timing import interpolated_barycentric_times

from .alongside import alongside
from .applicability import not_applying, visit_facts
from .base import ENTRY_NAME, VisitTask
from .heap import give_back
from .metadata import channel_text, ecsv_meta, fits_cards, set_time_keywords
from .products import table_hdu, write_ecsv, write_fits

__all__ = ["Bin", "read_spectra", "read_lightcurves", "wide_table", "usable_rows", "expand_rows",
           "set_aside_rows"]


def read_spectra(path, dtype=float):
    """Flux, variance, mask (n_exp, n_pix), pixel edges (um) and the exposure table.

    Flux and variance come as ``dtype`` (float64 by default; the product stores float32).
    """
    with fits.open(path, memmap=False) as hdul:
        flux = np.asarray(hdul["FLUX"].data, dtype)
        var = np.asarray(hdul["VARIANCE"].data, dtype)
        mask = np.asarray(hdul["MASK"].data) > 0
        wave = Table(hdul["WAVELENGTH"].data)
        exposures = Table(hdul["EXPOSURES"].data)
    edges = np.append(np.asarray(wave["wave_lo"], float), float(wave["wave_hi"][-1]))
    return flux, var, mask, edges, exposures


#: Exposures binned at a time: the temporaries of binning scale with a block, not the visit.
BLOCK_ROWS = 1024


def _median_over_exposures(values, good, columns=32):
    """Median over exposures of each pixel, from the good values, a block of pixels at a time."""
    out = np.empty(values.shape[1])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)          # a pixel bad in every exposure
        for a in range(0, values.shape[1], columns):
            block = np.asarray(values[:, a:a + columns], float)
            out[a:a + columns] = np.nanmedian(np.where(good[:, a:a + columns], block, np.nan), axis=0)
    return out


def _bin_in_blocks(pix_edges, flux, var, mask, edges, scale=None, fill_spec=None, fill_var=None):
    """:func:`bin_spectra` over blocks of :data:`BLOCK_ROWS` exposures (the same numbers: it
    treats every exposure on its own), with the fill of each block scaled per exposure."""
    parts = []
    for a in range(0, len(flux), BLOCK_ROWS):
        rows = slice(a, a + BLOCK_ROWS)
        fill = fvar = None
        if fill_spec is not None:
            fill = fill_spec[None, :] * scale[rows, None]
            fvar = fill_var[None, :] * scale[rows, None]
        parts.append(bin_spectra(pix_edges, np.asarray(flux[rows], float), np.asarray(var[rows], float),
                                 mask[rows], edges, fill=fill, fill_variance=fvar))
    first = parts[0]
    return BinnedSpectra(flux=np.concatenate([p.flux for p in parts]),
                         variance=np.concatenate([p.variance for p in parts]),
                         mask=np.concatenate([p.mask for p in parts]),
                         n_filled=np.concatenate([p.n_filled for p in parts]),
                         weights=first.weights, channel_edges=first.channel_edges)


def read_lightcurves(path):
    """LIGHTCURVES and CHANNELS tables of a bin product.

    LIGHTCURVES holds every exposure of the visit, those set aside at input
    included (``set_aside`` True, NaN fluxes): select the reduced ones with
    :func:`usable_rows` before fitting.  The CHANNELS table's
    ``meta["white_band_um"]`` holds the white band's edges (um) when the
    product records them.
    """
    with fits.open(path, memmap=False) as hdul:
        lc, channels = Table(hdul["LIGHTCURVES"].data), Table(hdul["CHANNELS"].data)
        head = hdul["LIGHTCURVES"].header
        if "WLO" in head and "WHI" in head:
            channels.meta["white_band_um"] = (float(head["WLO"]), float(head["WHI"]))
    return lc, channels


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


def _bridge(values):
    """Fill non-finite entries by linear interpolation between finite neighbours.

    A pixel bad in every exposure (e.g. a bad column under a box extraction)
    takes its neighbours' value, so that it can be filled rather than flag its
    channel in every exposure; 0 where nothing is finite.
    """
    values = np.asarray(values, float)
    ok = np.isfinite(values)
    if ok.all() or not ok.any():
        return np.where(ok, values, 0.0)
    index = np.arange(values.size)
    return np.where(ok, values, np.interp(index, index[ok], values[ok]))


def _channel_edges(params, pixel_edges, mean_spectrum, lit):
    """Channel edges: the visit's list, or channels made over the lit range ``lit``."""
    lo, hi = float(np.min(pixel_edges)), float(np.max(pixel_edges))
    if params["edges"]:
        edges = channel_edges_from_list(params["edges"])
    elif params["width"] > 0:
        if params["width"] > lit.hi - lit.lo:
            raise ParameterError(f"bin.width: {params['width']:g} um is wider than the lit part of "
                                 f"the spectrum, {lit.lo:.4f}-{lit.hi:.4f} um")
        edges = uniform_channel_edges((lit.lo, lit.hi), width=params["width"])
    elif params["equal_counts"]:
        edges = equal_count_channel_edges(pixel_edges, mean_spectrum, params["n_channels"],
                                          wavelength_range=(lit.lo, lit.hi))
    else:
        edges = uniform_channel_edges((lit.lo, lit.hi), n_channels=params["n_channels"])
    edges = np.asarray(edges, float)
    if edges[0] < lo - 1e-9 or edges[-1] > hi + 1e-9:
        raise ParameterError(f"bin.edges: channels {edges[0]:.4f}-{edges[-1]:.4f} um reach outside "
                             f"the extracted spectrum's {lo:.4f}-{hi:.4f} um")
    return edges


def wide_table(lc, n_channels, channels=None):
    """The LIGHTCURVES table with one column per channel (for ECSV readers).

    With ``channels`` (the CHANNELS table) each channel column's description
    ends with the channel's wavelength range.
    """
    out = Table()
    for name in lc.colnames:
        col = lc[name]
        if col.ndim == 2:
            base = (col.description or name).split("; vector over")[0]
            for j in range(n_channels):
                where = channel_text(channels, j) if channels is not None else f"channel {j}"
                out[f"{name}_{j:02d}"] = col[:, j]
                out[f"{name}_{j:02d}"].unit = col.unit
                out[f"{name}_{j:02d}"].description = f"{base}, {where}"
        else:
            out[name] = col
    return out


# Column descriptions of LIGHTCURVES; the README's table is written from this.
COLUMNS = {
    "exposure": ("", "exposure number in start-time order"),
    "time_bjd_tdb": ("d", "mid-exposure time, BJD_TDB (barycentric JD, TDB scale)"),
    "time_mjd_utc": ("d", "same instant, MJD (JD - 2400000.5) in UTC at the observer"),
    "exposure_time": ("s", "exposure duration: zero read to last read"),
    "white_flux": ("electron", "white-band flux"),
    "white_error": ("electron", "1-sigma error of white_flux"),
    "white_mask": ("", "True where white_flux is unusable"),
    "flux": ("electron", "channel flux; vector over the CHANNELS rows"),
    "error": ("electron", "1-sigma error of flux; vector over the CHANNELS rows"),
    "mask": ("", "True where flux is unusable; vector over the CHANNELS rows"),
    "n_filled": ("", "pixels filled from the median spectrum; vector over CHANNELS"),
    "orbit": ("", "orbit number, 0 = first (one orbit for a stare), split at occultation gaps"),
    "orbit_time": ("d", "time since the orbit's first exposure started (orbit phase)"),
    "visit_time": ("d", "time since the visit's first exposure started"),
    "scan_direction": ("", "+1 forward scan, -1 reverse scan, 0 staring"),
    "dx": ("pix", "spectrum shift along the dispersion relative to the reference"),
    "dy": ("pix", "spatial shift of the trace or scanned band"),
    "width": ("pix", "spatial width of the trace (Gaussian sigma) or scanned band length"),
    "background": ("electron", "median sky background per pixel"),
    "first_orbit": ("", "True in the visit's first orbit"),
    "first_in_orbit": ("", "True for an orbit's first exposure"),
    "flux_outlier": ("", "True where the white flux departs from its running median"),
}

# Columns that say where each exposure came from and whether it was set aside at input.
SET_ASIDE_COLUMNS = {
    "file": ("", "raw file holding the exposure"),
    "file_index": ("", "exposure's index in its file's READS; -1: one exposure per file"),
    "set_aside": ("", "True: exposure set aside at input (NaN fluxes, masks True)"),
    "reason": ("", "why the exposure was set aside; empty when it was reduced"),
}


# Column descriptions of CHANNELS and SPECTRUM.
CHANNEL_COLUMNS = {
    "channel": ("", "channel number: element of the LIGHTCURVES vectors, NN of flux_NN"),
    "wave_lo": ("um", "lower wavelength edge of the channel"),
    "wave_hi": ("um", "upper wavelength edge of the channel"),
    "wave_mid": ("um", "centre of the channel, (wave_lo + wave_hi) / 2"),
    "n_pixels": ("pix", "spectral pixels in the channel, weighted by their overlap"),
    "mean_counts": ("electron", "mean channel flux over the exposures"),
    "light": ("", "mean light per pixel / peak of the median spectrum"),
    "dim": ("", "True where light < LITTHR: the channel holds little light"),
}
SPECTRUM_COLUMNS = {
    "wave_lo": ("um", "lower wavelength edge of the pixel"),
    "wave_hi": ("um", "upper wavelength edge of the pixel"),
    "flux": ("electron", "median of the aligned spectra, per pixel"),
    "error": ("electron", "1-sigma error of flux: median error / sqrt(exposures)"),
}


class Bin(VisitTask):
    """Bin the aligned spectra into channel and white light curves."""

    stage = "bin"

    def requires(self):
        from .extract import Extract
        return self.stage_task(Extract)

    def output(self):
        return luigi.LocalTarget(str(self.folder / ENTRY_NAME))

    def final_product(self):
        return self.folder / "lightcurves.fits"

    def inventory(self):
        """Every exposure of the visit (rawio.ExposureRef), set-aside ones included."""
        plan = self.plan
        if plan is not None and plan.inventory is not None:
            return list(plan.inventory)
        from .rawio import refs_from_table
        path = self.stage_folder("calibrate") / "inventory.ecsv"
        return refs_from_table(Table.read(path, format="ascii.ecsv"), self.config.raw)

    def run(self):
        started = time.time()
        visit, params = self.config, self.params
        spectra_path = self.requires().final_product()
        give_back()                     # what the stages before let go of
        flux, var, mask, pix_edges, exp = read_spectra(spectra_path, dtype=np.float32)
        self.progress(0, 3, "binning")
        # the spectra stay as stored (float32); sums, medians and binning work in float64 on
        # blocks of exposures or pixels, so memory does not grow with the visit's temporaries
        good = ~mask & np.isfinite(flux)
        total = np.concatenate([np.sum(np.where(good[a:a + BLOCK_ROWS],
                                                np.asarray(flux[a:a + BLOCK_ROWS], float), 0.0), axis=1)
                                for a in range(0, len(flux), BLOCK_ROWS)])
        median_spec = _median_over_exposures(flux, good)
        median_spec = _bridge(median_spec)
        lit = lit_range(pix_edges, median_spec, params["lit_threshold"])
        edges = _channel_edges(params, pix_edges, median_spec, lit)
        light = channel_light(pix_edges, median_spec, edges, lit.peak)
        dim = light < params["lit_threshold"]
        scale = fill_spec = fill_var = None
        median_var = _median_over_exposures(var, good)
        if params["fill"] == "profile":
            # a bad pixel takes the median spectrum scaled to its exposure's total, and the
            # median variance scaled alike
            scale = total / max(np.sum(median_spec), 1e-30)
            fill_spec = median_spec
            fill_var = _bridge(median_var)
        binned = _bin_in_blocks(pix_edges, flux, var, mask, edges, scale, fill_spec, fill_var)
        white_range = params["white_range"] or (edges[0], edges[-1])
        white = _bin_in_blocks(pix_edges, flux, var, mask, np.asarray(white_range, float), scale,
                               fill_spec, fill_var)
        n_spectra = len(flux)
        del flux, var, mask, good       # the visit's spectra are binned: let them go
        give_back()
        self.progress(1, 3, "times and covariates")

        mid_mjd = np.asarray(exp["start_mjd_utc"], float) + np.asarray(exp["mid_offset"], float) / 86400
        geo = np.asarray(exp["obsgeo"], float)
        obsgeo = None if np.all(np.isnan(geo)) else np.where(np.isnan(geo), 0.0, geo)
        # once per visit on a grid an hour apart, interpolated (a few us from the direct value)
        times = interpolated_barycentric_times(mid_mjd, visit.target["ra"], visit.target["dec"],
                                               obsgeo_m=obsgeo)
        stare = bool(np.all(np.asarray(exp["scan_direction"]) == 0))
        cov = exposure_covariates(np.asarray(exp["start_mjd_utc"], float), mid_mjd,
                                  white_flux=white.flux[:, 0], stare=stare,
                                  gap_minutes=params["orbit_gap_minutes"] or None)

        lc = Table()
        lc["exposure"] = np.asarray(exp["exposure"], int)
        lc["time_bjd_tdb"] = times.bjd_tdb
        lc["time_mjd_utc"] = times.mjd_utc
        lc["exposure_time"] = np.asarray(exp["exposure_time"], float)
        lc["white_flux"] = white.flux[:, 0]
        lc["white_error"] = np.sqrt(white.variance[:, 0])
        lc["white_mask"] = white.mask[:, 0]
        lc["flux"] = binned.flux
        lc["error"] = np.sqrt(binned.variance)
        lc["mask"] = binned.mask
        lc["n_filled"] = binned.n_filled
        for name, values in cov.columns().items():
            lc[name] = values
        lc["scan_direction"] = np.asarray(exp["scan_direction"], int)
        for name in ("dx", "dy", "width"):
            lc[name] = np.asarray(exp[name], float)
        lc["background"] = np.asarray(exp["background_level"], float)
        for name, (unit, text) in COLUMNS.items():
            if name in lc.colnames:
                lc[name].unit = unit or None
                lc[name].description = text
        # every exposure of the visit keeps its row: the set-aside ones with their reason
        inventory = self.inventory()
        lc_all = with_set_aside(lc, inventory, visit.target)
        n_aside = int(np.sum(lc_all["set_aside"]))

        channels = Table()
        channels["channel"] = np.arange(len(edges) - 1)
        channels["wave_lo"] = edges[:-1]
        channels["wave_hi"] = edges[1:]
        channels["wave_mid"] = 0.5 * (edges[:-1] + edges[1:])
        channels["n_pixels"] = binned.weights.sum(axis=0)
        channels["mean_counts"] = np.nanmean(binned.flux, axis=0)
        channels["light"] = light
        channels["dim"] = dim
        for name, (unit, text) in CHANNEL_COLUMNS.items():
            channels[name].unit = unit or None
            channels[name].description = text
        spectrum = Table()
        spectrum["wave_lo"] = pix_edges[:-1]
        spectrum["wave_hi"] = pix_edges[1:]
        spectrum["flux"] = median_spec
        spectrum["error"] = np.sqrt(median_var / max(n_spectra, 1))
        for name, (unit, text) in SPECTRUM_COLUMNS.items():
            spectrum[name].unit = unit
            spectrum[name].description = text

        self.progress(2, 3, "writing light curves")
        prov = self.provenance([spectra_path])
        folder = self.folder
        from .figures import bin_figure
        fig = folder / "lightcurves.png"
        # --workers N: the figure is drawn in a forked process while the tables are written
        side = alongside()
        side.start(bin_figure, fig, lc, channels, spectrum, (lit.lo, lit.hi))
        fits_path = folder / "lightcurves.fits"
        hdus = [table_hdu(lc_all, "LIGHTCURVES"), table_hdu(channels, "CHANNELS"),
                table_hdu(spectrum, "SPECTRUM")]
        hdus[0].header["WLO"] = (float(white_range[0]), "white band lower edge, um")
        hdus[0].header["WHI"] = (float(white_range[1]), "white band upper edge, um")
        hdus[0].header["ERRKIND"] = ("1-sigma", "error columns hold standard deviations")
        hdus[1].header["LITLO"] = (lit.lo, "lit part of the median spectrum: from, um")
        hdus[1].header["LITHI"] = (lit.hi, "lit part of the median spectrum: to, um")
        hdus[1].header["LITTHR"] = (lit.threshold, "lit: smoothed spectrum >= LITTHR x peak")
        n_ch = len(edges) - 1
        facts = fits_cards(visit, lc["time_bjd_tdb"], lc["exposure_time"], n_ch)
        for key, value, comment in facts:
            hdus[0].header[key] = (value, comment)
        set_time_keywords(hdus[0])
        write_fits(fits_path, hdus, prov, header={"TIMESYS": "TDB", "TIMEREF": "SOLARSYSTEM",
                                                   **{k: (v, c) for k, v, c in facts[:4]}})
        outputs = [fits_path]
        meta = ecsv_meta(visit, lc["time_bjd_tdb"], lc["exposure_time"], channels)
        wide = wide_table(lc_all, n_ch, channels)
        wide.meta.update(meta)
        wide.meta["white_band_um"] = [float(white_range[0]), float(white_range[1])]
        channels_ecsv = channels.copy(copy_data=False)
        channels_ecsv.meta.update(meta)
        for name, table in (("lightcurves.ecsv", wide), ("channels.ecsv", channels_ecsv),
                            ("spectrum.ecsv", spectrum)):
            write_ecsv(folder / name, table, prov)
            outputs.append(folder / name)
        side.wait()
        white_flux = lc["white_flux"][~lc["white_mask"]]
        metrics = {"channels": n_ch, "white band (um)": [float(white_range[0]), float(white_range[1])],
                   "exposures set aside (rows kept, flagged)": n_aside,
                   "lit part of the spectrum (um)": [round(lit.lo, 4), round(lit.hi, 4)],
                   "dim channels": [int(j) for j in np.flatnonzero(dim)],
                   "orbits": int(cov.n_orbits),
                   "orbit gap threshold (min)": (round(cov.gap_threshold * 1440.0, 3)
                                                 if np.isfinite(cov.gap_threshold) else None),
                   "flagged channel-exposures": int(np.sum(binned.mask)),
                   "filled pixels": int(np.sum(binned.n_filled)),
                   "white flux median (e-)": float(np.median(white_flux)) if white_flux.size else None,
                   "flux outliers": int(np.sum(cov.flux_outlier))}
        self.progress(3, 3, "light curves written")
        warnings = [f"channel {j} ({channel_text(channels, j)[len(f'channel {j}, '):]}) is dim: "
                    f"{100 * light[j]:.0f} % of the peak light per pixel" for j in np.flatnonzero(dim)]
        if cov.orbit_note:
            warnings.append(f"{cov.orbit_note}; set bin.orbit_gap_minutes to split the orbits "
                            f"by hand")
        facts = visit_facts(scanning=not stare, n_orbits=int(cov.n_orbits), kind=visit.event["kind"])
        self.write_entry(self.output().path, [spectra_path], outputs, metrics, [fig], started,
                         warnings=warnings, not_applying=not_applying("bin", params, facts))
