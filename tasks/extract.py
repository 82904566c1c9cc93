"""Extract stage: calibrated frames to spectra on one wavelength grid, with drifts.

Products in ``NOTEBOOK/extract-IDENT/``:

``reference.fits``
    MEDIAN (median calibrated frame of up to 24 exposures spread over the
    visit), REFSPEC (reference spectrum and the wavelength grid: column,
    wavelength, wave_lo, wave_hi, flux) and a header with the trace (centre
    polynomial, width, aperture) or the scanned band, and the refined
    wavelength zero point;
``spectra-NNN.fits``
    spectra of chunk NNN before gathering;
``spectra.fits``
    FLUX, VARIANCE (electrons per pixel, squared), MASK (1 = unusable) of
    shape (n_exposures, n_pixels) on the reference grid, WAVELENGTH (centre
    and edges of every pixel, um) and EXPOSURES (the calibrate stage's
    exposure table plus dx, dy, width, scan_length, n_rejected);
``extract.png``
    a waterfall of spectra, shifts against time, the spatial profile.
"""

import time
import warnings

import astropy.units as u
import luigi
import numpy as np
from astropy.io import fits
from astropy.table import Table, hstack, vstack

from lightledger.pipeline.drift import spectral_shift
from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.extract import extract_chunk
from lightledger.pipeline.mask import to_boolean
from lightledger.pipeline.resample import resample
from lightledger.pipeline.trace import fit_trace, refine, scan_band
from lightledger.pipeline.wavelength import (column_wavelengths, pixel_edges, reference_column,
                                             refine_solution)

from .alongside import alongside
from .applicability import not_applying, visit_facts
from .base import ENTRY_NAME, VisitTask, chunk_ranges
from .calibrate import Calibrate, read_chunk
from .geometry import expected_source_rows
from .heap import give_back
from .products import table_hdu, write_fits
from .references import load_throughput

__all__ = ["ExtractReference", "ExtractChunk", "Extract"]

N_REFERENCE = 24


def _good_frames(flux, bits):
    bad = to_boolean(bits) | ~np.isfinite(flux)
    return bad


class ExtractReference(VisitTask):
    """Median frame, trace or scanned band, reference spectrum and wavelength grid."""

    stage = "extract"

    def requires(self):
        return self.stage_task(Calibrate)

    def output(self):
        return luigi.LocalTarget(str(self.folder / "reference.fits"))

    def run(self):
        visit, params = self.config, self.params
        calib = self.requires()
        paths = self.calibrated_chunks()
        exposures = Table.read(calib.folder / "exposures.ecsv", format="ascii.ecsv")
        n = len(exposures)
        pick = np.unique(np.linspace(0, n - 1, min(N_REFERENCE, n)).round().astype(int))
        frames, masks, inputs = [], [], []
        ranges = chunk_ranges(n, calib.params["chunk_size"])
        for k, (path, (start, stop)) in enumerate(zip(paths, ranges)):
            self.progress(0, n, "reference frame and trace", part=-1)
            local = pick[(pick >= start) & (pick < stop)] - start
            if local.size:          # only chunks holding a picked exposure are read, once
                flux, _, bits, _ = read_chunk(path)
                frames.append(flux[local])
                masks.append(_good_frames(flux[local], bits[local]))
                inputs.append(path)
        flux = np.concatenate(frames)
        bad = np.concatenate(masks)
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)    # columns bad in every frame
            median = np.nanmedian(np.where(bad, np.nan, flux), axis=0)
        median_bad = ~np.isfinite(median)
        median = np.where(median_bad, 0.0, median)
        ny, nx = median.shape
        scanning = bool(np.any(np.asarray(exposures["scan_direction"]) != 0))
        pad = params["aperture_padding"]
        header = {"SCANNING": scanning}
        if scanning:
            band = scan_band(median, median_bad)
            lo = int(max(0, np.floor(band.row_lo[0] - pad)))
            hi = int(min(ny, np.ceil(band.row_hi[0] + pad) + 1))
            header.update(BANDLO=(float(band.row_lo[0]), "scanned band lower edge, row"),
                          BANDHI=(float(band.row_hi[0]), "scanned band upper edge, row"))
            trace_rows = np.full(nx, 0.5 * (band.row_lo[0] + band.row_hi[0]))
        else:
            trace = fit_trace(median, median_bad, order=1, width_guess=visit.profile.width)
            trace_rows = trace.rows(np.arange(nx))
            lo = int(max(0, np.floor(trace_rows.min() - pad)))
            hi = int(min(ny, np.ceil(trace_rows.max() + pad) + 1))
            header.update(TRXREF=(float(trace.x_ref), "trace polynomial reference column"),
                          TRWIDTH=(float(trace.width), "trace Gaussian sigma, rows"),
                          TRRMS=(float(trace.residual_rms), "rms of column centroids about the fit"))
            for k, c in enumerate(trace.coefficients):
                header[f"TRCOEF{k}"] = (float(c), f"trace row polynomial coefficient {k}")
        header.update(APLO=(lo, "aperture first row"), APHI=(hi, "aperture row after the last"))
        ref_spec = np.sum(median[lo:hi], axis=0)

        origin_x = int(exposures["origin_x"][0])
        wave, edges, shift = self._wavelengths(nx, origin_x, ref_spec)
        header["WAVESHFT"] = (float(shift), "refined dispersion zero point shift, pixels")
        table = Table()
        table["column"] = np.arange(nx)
        table["wavelength"] = wave
        table["wave_lo"] = np.minimum(edges[:-1], edges[1:])
        table["wave_hi"] = np.maximum(edges[:-1], edges[1:])
        table["flux"] = ref_spec
        table["trace_row"] = trace_rows
        for name, unit in (("wavelength", "um"), ("wave_lo", "um"), ("wave_hi", "um"),
                           ("flux", "electron"), ("trace_row", "pix")):
            table[name].unit = unit
        hdus = [fits.ImageHDU(median.astype(np.float32), name="MEDIAN"),
                table_hdu(table, "REFSPEC")]
        inputs.append(calib.folder / "exposures.ecsv")
        throughput = visit.profile.files.get("throughput") if params["refine_wavelength"] else None
        if throughput is not None:
            inputs.append(throughput)
        write_fits(self.output().path, hdus, self.provenance(inputs), header=header)

    def _wavelengths(self, nx, origin_x, ref_spec):
        """Wavelength per column and pixel edges (um), refined against the model spectrum."""
        visit = self.config
        coeffs = np.asarray(visit.profile.dispersion, float)
        x_ref = reference_column(visit.target["source_x"], visit.profile.column_offset)
        shift = 0.0
        throughput = load_throughput(visit.profile) if self.params["refine_wavelength"] else None
        if throughput is not None:
            pad = 30
            columns = np.arange(-pad, nx + pad)
            wave = column_wavelengths(columns, coeffs, x_ref, origin_x=origin_x)
            dispersion = np.abs(np.gradient(wave))
            from astropy.modeling.physical_models import BlackBody   # once per visit: import here

            photons = BlackBody(temperature=visit.target["teff"] * u.K)(wave * u.um).value / wave
            model = np.interp(wave, *throughput, left=0.0, right=0.0) * photons * dispersion
            order = np.argsort(wave)
            fit = refine_solution(ref_spec, wave[order], model[order], coeffs, x_ref,
                                  origin_x=origin_x)
            coeffs, shift = np.asarray(fit.coefficients, float), float(fit.shift)
        wave = column_wavelengths(np.arange(nx), coeffs, x_ref, origin_x=origin_x)
        edges = pixel_edges(nx, coeffs, x_ref, origin_x=origin_x)
        return wave, edges, shift


def read_reference(path):
    with fits.open(path, memmap=False) as hdul:
        return dict(hdul[0].header), Table(hdul["REFSPEC"].data), np.asarray(hdul["MEDIAN"].data, float)


class ExtractChunk(VisitTask):
    """Spectra of one chunk of calibrated exposures, aligned on the reference grid."""

    stage = "extract"
    chunk = luigi.IntParameter(description="chunk number, as in the calibrate stage")

    def requires(self):
        return self.stage_task(ExtractReference)

    def output(self):
        return luigi.LocalTarget(str(self.folder / f"spectra-{self.chunk:03d}.fits"))

    def run(self):
        params = self.params
        chunk_path = self.stage_folder("calibrate") / f"frames-{self.chunk:03d}.fits"
        header, refspec, _ = read_reference(self.input().path)
        n_visit = len(self.exposures())
        self.progress(0, n_visit, "extracting spectra", part=self.chunk)
        flux, var, bits, exposures = read_chunk(chunk_path)
        bad = _good_frames(flux, bits) | ~np.isfinite(var) | (var <= 0)
        n, ny, nx = flux.shape
        lo, hi = header["APLO"], header["APHI"]
        pad = params["aperture_padding"]
        if header["SCANNING"]:
            band = scan_band(flux, bad)
            row_lo = np.clip(np.floor(band.row_lo - pad), 0, ny - 1).astype(int)
            row_hi = np.clip(np.ceil(band.row_hi + pad) + 1, 1, ny).astype(int)
            aperture = (row_lo, row_hi)
            centre = 0.5 * (band.row_lo + band.row_hi)
            dy = centre - 0.5 * (header["BANDLO"] + header["BANDHI"])
            width = band.length
            trace_offset = None
        else:
            aperture = (lo, hi)
            coeffs = [header[f"TRCOEF{k}"] for k in range(10) if f"TRCOEF{k}" in header]
            from lightledger.pipeline.trace import Trace
            trace = Trace(coefficients=np.asarray(coeffs), x_ref=header["TRXREF"],
                          width=header["TRWIDTH"], row_lo=lo, row_hi=hi, residual_rms=0.0,
                          n_columns=nx)
            offsets = refine(trace, flux, bad)
            dy, width = offsets.offset, offsets.width
            rows = trace.rows(np.arange(nx))
            trace_offset = rows - rows.mean()
        spec = extract_chunk(flux, var, bad, method=params["method"], aperture=aperture,
                             threshold=params["clip_threshold"], profile_order=params["profile_order"],
                             trace_offset=trace_offset if params["follow_tilt"] else None)
        self.progress(0.8 * n, n_visit, "extracting spectra", part=self.chunk)
        reference = np.asarray(refspec["flux"], float)
        shifts = spectral_shift(spec.flux, reference, variance=spec.variance, mask=spec.mask)
        out_flux, out_var, out_mask = spec.flux, spec.variance, spec.mask
        out_mask = out_mask | ~np.isfinite(out_flux) | ~np.isfinite(out_var)
        if params["align"]:
            grid = np.arange(nx + 1) - 0.5
            old = grid[None, :] - shifts.shift[:, None]
            moved = resample(old, spec.flux, grid, variance=spec.variance, mask=spec.mask)
            out_flux, out_var, out_mask = moved.flux, moved.variance, moved.mask
        drifts = Table()
        drifts["dx"] = shifts.shift
        drifts["dx_error"] = shifts.shift_error
        drifts["dy"] = np.asarray(dy, float)
        drifts["width"] = np.asarray(width, float)
        drifts["n_rejected"] = np.asarray(spec.n_rejected).reshape(n, -1).sum(axis=1)
        for name, text in (("dx", "spectrum shift along the dispersion from the reference"),
                           ("dx_error", "1-sigma error of dx"),
                           ("dy", "shift of the trace or scanned band across the dispersion"),
                           ("width", "trace Gaussian sigma or scanned band length")):
            drifts[name].unit = "pix"
            drifts[name].description = text
        drifts["n_rejected"].description = "pixels rejected as outliers by the extraction"
        table = hstack([exposures, drifts])
        first_profile = np.asarray(spec.profile[0], np.float32)
        # float32 keeps 7 significant digits, far below the photon noise of any pixel
        hdus = [fits.ImageHDU(np.asarray(out_flux, np.float32), name="FLUX"),
                fits.ImageHDU(np.asarray(out_var, np.float32), name="VARIANCE"),
                fits.ImageHDU(np.asarray(out_mask, np.uint8), name="MASK"),
                table_hdu(table, "EXPOSURES"),
                fits.ImageHDU(first_profile, name="PROFILE")]
        write_fits(self.output().path, hdus, self.provenance([chunk_path, self.input().path]),
                   header={"CHUNK": self.chunk,
                           "PROFROW": (int(spec.row_lo), "frame row of the PROFILE's first row")})
        self.progress(n, n_visit, "extracting spectra", part=self.chunk)


class Extract(VisitTask):
    """Every chunk extracted, gathered into one product of spectra."""

    stage = "extract"

    def requires(self):
        return self.stage_task(ExtractReference)

    def output(self):
        return luigi.LocalTarget(str(self.folder / ENTRY_NAME))

    def final_product(self):
        return self.folder / "spectra.fits"

    def run(self):
        chunks = [self.stage_task(ExtractChunk, chunk=i) for i in range(self.chunk_count())]
        yield chunks
        started = time.time()     # run() starts again once the chunks are complete
        give_back()               # the chunks' arrays (one worker: this process ran them)
        # the chunks' spectra are copied into the visit's arrays as they are read (float32, no
        # list of chunk copies to join): one copy of the visit's spectra in memory
        tables, profile, flux = [], None, None
        for task in chunks:
            start, stop = self.chunk_span(task.chunk)
            with fits.open(task.output().path, memmap=False) as hdul:
                part = hdul["FLUX"].data
                if flux is None:
                    n_visit = self.chunk_span(len(chunks) - 1)[1]
                    flux = np.empty((n_visit, part.shape[1]), np.float32)
                    var = np.empty_like(flux)
                    mask = np.empty(flux.shape, np.uint8)
                if part.shape != (stop - start, flux.shape[1]):
                    raise LightledgerError(f"{task.output().path}: FLUX has shape {part.shape}, not "
                                           f"({stop - start}, {flux.shape[1]}) of chunk {task.chunk}")
                flux[start:stop] = part
                var[start:stop] = hdul["VARIANCE"].data
                mask[start:stop] = hdul["MASK"].data
                tables.append(Table(hdul["EXPOSURES"].data))
                if profile is None:
                    profile = np.asarray(hdul["PROFILE"].data, float)
                    profile_row = int(hdul[0].header.get("PROFROW", 0))
        exposures = vstack(tables)
        header, refspec, _ = read_reference(self.input().path)
        wave = Table()
        wave["wavelength"] = refspec["wavelength"]
        wave["wave_lo"] = refspec["wave_lo"]
        wave["wave_hi"] = refspec["wave_hi"]
        if np.any(np.diff(np.asarray(wave["wavelength"], float)) <= 0):
            if np.all(np.diff(np.asarray(wave["wavelength"], float)) < 0):
                order = slice(None, None, -1)
                wave, flux, var, mask = wave[order], flux[:, order], var[:, order], mask[:, order]
            else:
                raise LightledgerError(f"{self.config.profile.path}: the dispersion polynomial is not "
                                       f"monotonic over the subarray")
        for name in ("wavelength", "wave_lo", "wave_hi"):
            wave[name].unit = "um"
        path = self.folder / "spectra.fits"
        hdus = [fits.ImageHDU(flux, name="FLUX"), fits.ImageHDU(var, name="VARIANCE"),
                fits.ImageHDU(mask, name="MASK"), table_hdu(wave, "WAVELENGTH"),
                table_hdu(exposures, "EXPOSURES")]
        hdus[0].header["BUNIT"] = ("electron", "electrons per pixel of the reference grid")
        hdus[1].header["BUNIT"] = ("electron2", "variance of FLUX")
        hdus[2].header["COMMENT"] = ("1 = the pixel's flux is unusable, 0 = usable (a boolean mask, "
                                     "not the frames' FLAGS bitfield)")
        inputs = [t.output().path for t in chunks] + [self.input().path]
        from .figures import extract_figure
        fig = self.folder / "extract.png"
        scanning = bool(header.get("SCANNING"))

        def draw():
            _, refspec_rows, median_frame = read_reference(self.input().path)
            ny, nx = median_frame.shape
            first = exposures[0]
            sky = expected_source_rows(self.config, nx, ny, (int(first["origin_x"]), int(first["origin_y"])),
                                       float(first["scan_velocity"]), float(first["exposure_time"]))
            return extract_figure(
                fig, np.asarray(wave["wavelength"], float), np.where(mask > 0, np.nan, flux),
                exposures, profile, median_frame=median_frame,
                aperture=(int(header["APLO"]), int(header["APHI"])),
                band=(header["BANDLO"], header["BANDHI"]) if scanning else None,
                trace_rows=None if scanning else np.asarray(refspec_rows["trace_row"], float),
                sky_rows=sky, method=self.params["method"], profile_row=profile_row)

        # --workers N: the figure is drawn in a forked process while the spectra are written
        side = alongside()
        side.start(draw)
        write_fits(path, hdus, self.provenance(inputs))
        side.wait()
        metrics = {"method": self.params["method"],
                   "dx rms (pix)": float(np.nanstd(exposures["dx"])),
                   "dy rms (pix)": float(np.nanstd(exposures["dy"])),
                   "wavelength shift (pix)": float(header.get("WAVESHFT", 0.0)),
                   "rejected pixels": int(np.sum(exposures["n_rejected"])),
                   "masked spectral pixels": int(np.sum(mask > 0)),
                   "aperture rows": [int(header["APLO"]), int(header["APHI"])]}
        # the entry names what the stage read from the calibrate folder too (its lineage)
        upstream = [*self.calibrated_chunks(), self.stage_folder("calibrate") / "exposures.ecsv"]
        facts = visit_facts(scanning=scanning, n_orbits=None, kind=self.config.event["kind"])
        self.write_entry(self.output().path, inputs + upstream, [path, self.input().path], metrics,
                         [fig], started, extra_seconds=self.task_seconds(inputs),
                         not_applying=not_applying("extract", self.params, facts))
        self.progress(len(exposures), len(exposures), "spectra extracted")
