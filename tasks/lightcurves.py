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

import luigi
import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.covariates import exposure_covariates
from lightledger.pipeline.lit import channel_light, lit_range
from lightledger.pipeline.timing import interpolated_barycentric_times

from .alongside import alongside
from .applicability import not_applying, visit_facts
from .base import ENTRY_NAME, VisitTask
from .binsteps import BLOCK_ROWS, _bin_in_blocks, _bridge, _channel_edges, _median_over_exposures
from .heap import give_back
from .lightcurvecolumns import (CHANNEL_COLUMNS, COLUMNS, SET_ASIDE_COLUMNS,  # noqa: F401
                                SPECTRUM_COLUMNS, wide_table)
from .lightcurverows import (_fill_value, _set_aside_times, expand_rows,  # noqa: F401
                             set_aside_rows, usable_rows, with_set_aside)
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
