"""Calibrate stage: raw ramps to calibrated frames, one Luigi task per chunk of exposures.

Products in ``NOTEBOOK/calibrate-IDENT/``:

``inventory.ecsv``
    one row per exposure in start-time order: file, index, start time, read
    times, scan velocity, observer position, subarray origin, and whether it
    was set aside (``excluded``) with its ``reason``; set-aside exposures keep
    their rows and their numbers, and are not calibrated;
``frames-NNN.fits``
    the calibrated exposures of chunk NNN: FLUX (electrons), VARIANCE
    (electrons squared), FLAGS (the project's data-quality bitfield, legend
    in the LLFLAGn keywords) as cubes of shape (n_exposures, n_rows,
    n_columns), and EXPOSURES, a table of per-exposure
    facts (mid-time, exposure time, scan direction and rate, background level,
    flagged pixels by kind);
``exposures.ecsv``
    the EXPOSURES tables of every chunk joined;
``calibrate.png``
    a calibrated frame, its mask and background, and flagged-pixel counts
    and background against time;
``entry.json``
    the notebook entry (written last).
"""

import time
from pathlib import Path

import luigi
import numpy as np
from astropy.io import fits
from astropy.table import Table, vstack

from lightledger.pipeline import mask as dq
from lightledger.pipeline.calibrate import calibrate_exposure
from lightledger.pipeline.chunkcal import ExposureSetup, calibrate_chunk

from .alongside import alongside
from .applicability import not_applying, visit_facts
from .base import ENTRY_NAME, VisitTask, chunk_ranges, settings_from_text
from .check import clip_level, visit_exposures
from .geometry import expected_source_rows
from .heap import give_back
from .products import table_hdu, write_ecsv, write_fits
from .rawio import inventory_table, read_exposures
from .references import load_references

__all__ = ["Inventory", "CalibrateChunk", "Calibrate", "chunk_ranges", "read_chunk",
           "calibrate_reads", "calibrate_chunk_reads"]


def _destripe_mode(setting, scan_velocity):
    """'auto' destripes each read difference of a staring exposure and leaves scans alone."""
    if setting == "auto":
        return "off" if scan_velocity else "differences"
    return setting


def calibrate_reads(visit, params, ref, exp, reads):
    """Calibrate one exposure's reads with the visit's profile and calibrate parameters.

    Parameters
    ----------
    visit : config.Visit
    params : dict
        The calibrate stage's parameters.
    ref : references.References
        Reference arrays cut to the subarray.
    exp : rawio.ExposureRef
    reads : ndarray of shape (n_reads, ny, nx), ADU

    Returns
    -------
    lightledger.pipeline.calibrate.CalibratedExposure
    """
    ny, nx = exp.shape[1:]
    source_rows = expected_source_rows(visit, nx, ny, exp.origin, exp.scan_velocity,
                                       exp.exposure_time)
    return calibrate_exposure(
        reads, np.asarray(exp.read_times), bias_adu=ref.bias, dark_rate=ref.dark,
        flat=ref.flat, nonlinearity=ref.nonlinearity, bad_pixels=ref.bad_pixels,
        gain=visit.profile.gain, read_noise=visit.profile.read_noise,
        saturation_adu=visit.profile.saturation, scan_velocity=exp.scan_velocity,
        source_rows=source_rows, ramp_method=params["ramp_method"],
        background_method=params["background_method"],
        destripe=_destripe_mode(params["destripe"], exp.scan_velocity),
        jump_threshold=params["break_threshold"],
        scan_options={"pad_rows": params["band_padding"]} if exp.scan_velocity else None,
        detect_clipping=True, clip_level=clip_level(exp, ref.bias, visit.profile.saturation),
        storage_span=exp.wrap)


def calibrate_chunk_reads(visit, params, ref, refs, reads, progress=None):
    """Calibrate a chunk's exposures as :func:`calibrate_reads` does each, in blocks.

    Parameters
    ----------
    visit, params, ref
        As :func:`calibrate_reads`.
    refs : sequence of rawio.ExposureRef
        The chunk's exposures, of one frame shape.
    reads : ndarray of shape (n_exposures, n_reads, ny, nx), ADU
    progress : callable, optional
        ``progress(done)`` with the exposures done so far.

    Returns
    -------
    lightledger.pipeline.chunkcal.CalibratedChunk
    """
    ny, nx = refs[0].shape[1:]
    levels = {}     # one array per storage kind, so that exposures alike share a block
    for exp in refs:
        if exp.bitpix not in levels:
            levels[exp.bitpix] = clip_level(exp, ref.bias, visit.profile.saturation)
    setups = [ExposureSetup(
        read_times=tuple(float(t) for t in exp.read_times), scan_velocity=float(exp.scan_velocity),
        source_rows=expected_source_rows(visit, nx, ny, exp.origin, exp.scan_velocity, exp.exposure_time),
        destripe=_destripe_mode(params["destripe"], exp.scan_velocity),
        clip_level=levels[exp.bitpix], storage_span=exp.wrap,
        scan_options={"pad_rows": params["band_padding"]} if exp.scan_velocity else None)
        for exp in refs]
    return calibrate_chunk(
        reads, setups, bias_adu=ref.bias, dark_rate=ref.dark, flat=ref.flat,
        nonlinearity=ref.nonlinearity, bad_pixels=ref.bad_pixels, gain=visit.profile.gain,
        read_noise=visit.profile.read_noise, saturation_adu=visit.profile.saturation,
        ramp_method=params["ramp_method"], background_method=params["background_method"],
        jump_threshold=params["break_threshold"], detect_clipping=True, progress=progress)


class Inventory(VisitTask):
    """List the visit's exposures from the raw headers."""

    stage = "calibrate"

    def output(self):
        return luigi.LocalTarget(str(self.folder / "inventory.ecsv"))

    def run(self):
        visit, plan = self.config, self.plan
        # the run's validation pass listed every exposure, set-aside ones included; a task run
        # elsewhere takes the list again
        refs = plan.inventory if plan is not None and plan.inventory is not None \
            else visit_exposures(self.visit, self.settings, settings_from_text(self.settings))
        table = inventory_table(refs)
        files = sorted({r.file for r in refs})
        write_ecsv(self.output().path, table, self.provenance(files))


class CalibrateChunk(VisitTask):
    """Calibrate one chunk of consecutive exposures."""

    stage = "calibrate"
    chunk = luigi.IntParameter(description="chunk number (chunks of calibrate.chunk_size exposures)")

    def requires(self):
        return self.stage_task(Inventory)

    def output(self):
        return luigi.LocalTarget(str(self.folder / f"frames-{self.chunk:03d}.fits"))

    def run(self):
        visit, params = self.config, self.params
        start, stop = self.chunk_span(self.chunk)
        refs = self.chunk_exposures(self.chunk)
        n_visit = len(self.exposures())
        ny, nx = refs[0].shape[1:]
        ref = load_references(visit.profile, (ny, nx), refs[0].origin, visit.target["source_x"])
        rows = []
        chunk_reads = read_exposures(refs, visit.profile)     # each raw file opened once
        self.progress(0, n_visit, "calibrating exposures", part=self.chunk)

        def progress(done):
            self.progress(done, n_visit, "calibrating exposures", part=self.chunk)

        # blocks of exposures at once (pipeline.chunkcal), the numbers of calibrate_reads
        cal = calibrate_chunk_reads(visit, params, ref, refs, chunk_reads, progress=progress)
        del chunk_reads
        flux, var, bits = cal.flux, cal.variance, cal.bits
        for i, exp in enumerate(refs):
            row = {"exposure": exp.exposure, "start_mjd_utc": exp.start_mjd,
                   "mid_offset": float(cal.mid_time_offset[i]),
                   "integration_time": float(cal.integration_time[i]),
                   "exposure_time": exp.exposure_time, "scan_velocity": exp.scan_velocity,
                   "scan_direction": int(np.sign(exp.scan_velocity)),
                   "background_level": float(cal.background_level[i]),
                   "origin_x": exp.origin[0], "origin_y": exp.origin[1],
                   "obsgeo": np.asarray(exp.obsgeo if exp.obsgeo else (np.nan,) * 3, float)}
            row.update({f"n_{name.lower()}": int(cal.flag_counts[name][i]) for name in dq.FLAGS})
            rows.append(row)
        self.progress(len(refs), n_visit, "calibrating exposures", part=self.chunk)
        exposures = Table(rows=rows, names=list(rows[0]))
        for col in exposures.colnames:
            unit, text = EXPOSURE_COLUMNS.get(col, ("", None))
            exposures[col].unit = unit or None
            exposures[col].description = text or _flag_count_text(col)
        hdus = [fits.ImageHDU(flux, name="FLUX"), fits.ImageHDU(var, name="VARIANCE"),
                fits.ImageHDU(bits, name="FLAGS", uint=True),
                table_hdu(exposures, "EXPOSURES")]
        hdus[0].header["BUNIT"] = ("electron", "charge from the zero read to the last read")
        hdus[1].header["BUNIT"] = ("electron2", "variance of FLUX")
        hdus[2].header["COMMENT"] = "lightledger data-quality bitfield: bit n set = flag LLFLAGn"
        for key, value, comment in dq.legend_cards():
            hdus[2].header[key] = (value, comment)
        inputs = [self.input().path, *sorted({e.file for e in refs}),
                  *[f for f in visit.profile.files.values() if f is not None]]
        write_fits(self.output().path, hdus, self.provenance(inputs),
                   header={"CHUNK": self.chunk, "EXPFIRST": start, "EXPLAST": stop - 1})


#: Units and descriptions of the EXPOSURES table of calibrated frames.
EXPOSURE_COLUMNS = {
    "exposure": ("", "exposure number in the visit's start-time order"),
    "start_mjd_utc": ("d", "zero read of the exposure, MJD in UTC"),
    "mid_offset": ("s", "mid-exposure (mean time of the reads used) after the zero read"),
    "integration_time": ("s", "time between the first and last reads used"),
    "exposure_time": ("s", "exposure duration: zero read to last read (XPOSURE)"),
    "scan_velocity": ("pix / s", "scan speed in rows per second, signed; 0 = staring"),
    "scan_direction": ("", "+1 forward scan, -1 reverse scan, 0 staring"),
    "background_level": ("electron", "median sky level subtracted, per pixel"),
    "origin_x": ("", "full-detector column of the subarray's first column"),
    "origin_y": ("", "full-detector row of the subarray's first row"),
    "obsgeo": ("m", "observer's geocentric x, y, z (NaN: the geocentre)"),
}


def _flag_count_text(column):
    name = column[2:].upper()
    value = dq.FLAGS.get(name)
    return f"pixels flagged {value} {name}" if value else column


def read_chunk(path, *, exposures_only=False):
    """FLUX, VARIANCE, FLAGS (bitfield) cubes and the EXPOSURES table of a calibrated chunk."""
    with fits.open(path, memmap=False) as hdul:
        table = Table(hdul["EXPOSURES"].data)
        if exposures_only:
            return table
        return (np.asarray(hdul["FLUX"].data, float), np.asarray(hdul["VARIANCE"].data, float),
                np.asarray(hdul["FLAGS"].data), table)


class Calibrate(VisitTask):
    """Every chunk of the visit calibrated, the exposures joined, the diagnostic figure."""

    stage = "calibrate"

    def requires(self):
        return self.stage_task(Inventory)

    def output(self):
        return luigi.LocalTarget(str(self.folder / ENTRY_NAME))

    def chunk_tasks(self):
        return [self.stage_task(CalibrateChunk, chunk=i) for i in range(self.chunk_count())]

    def run(self):
        chunks = self.chunk_tasks()
        yield chunks
        started = time.time()     # run() starts again once the chunks are complete
        paths = [c.output().path for c in chunks]
        give_back()               # the chunks' arrays (one worker: this process ran them)
        exposures = vstack([read_chunk(p, exposures_only=True) for p in paths])
        from .figures import calibrate_figure
        middle = len(paths) // 2
        flux, var, bits, _ = read_chunk(paths[middle])
        frame, frame_bits = flux[0].copy(), bits[0].copy()
        del flux, var, bits
        fig_path = self.folder / "calibrate.png"
        first = exposures[self.chunk_span(middle)[0]]
        ny, nx = frame_bits.shape
        source = expected_source_rows(self.config, nx, ny, (int(first["origin_x"]), int(first["origin_y"])),
                                      float(first["scan_velocity"]), float(first["exposure_time"]))
        # --workers N: the figure is drawn in a forked process while the table is written
        side = alongside()
        side.start(calibrate_figure, fig_path, frame, frame_bits, exposures, source_rows=source,
                   scanning=bool(first["scan_velocity"]))
        table_path = self.folder / "exposures.ecsv"
        write_ecsv(table_path, exposures, self.provenance(paths))
        counts = {name: int(np.sum(exposures[f"n_{name.lower()}"])) for name in dq.FLAGS}
        aside = self._set_aside()
        metrics = {"exposures": len(exposures), "chunks": len(paths),
                   "exposures set aside": len(aside),
                   **({"set aside (see inventory.ecsv)": aside} if aside else {}),
                   "median background (e-/pixel)": float(np.median(exposures["background_level"])),
                   **{f"flagged {k.lower()} (pixel-exposures)": v for k, v in counts.items() if v}}
        facts = visit_facts(scanning=bool(np.any(np.asarray(exposures["scan_direction"]) != 0)),
                            n_orbits=None, kind=self.config.event["kind"])
        side.wait()
        self.write_entry(self.output().path, [self.input().path, *paths],
                         [*paths, table_path, self.input().path], metrics, [fig_path], started,
                         extra_seconds=self.task_seconds(paths),
                         not_applying=not_applying("calibrate", self.params, facts))
        self.progress(len(exposures), len(exposures), "exposures calibrated")

    def _set_aside(self):
        """``"NUMBER FILE[index]: reason"`` of each set-aside exposure, from the run's inventory."""
        plan = self.plan
        if plan is not None and plan.inventory is not None:
            rows = [(r.exposure, Path(r.file).name, r.index, r.reason) for r in plan.inventory
                    if r.excluded]
        else:
            inventory = Table.read(self.input().path, format="ascii.ecsv")
            rows = [(row["exposure"], row["file"], row["index"], row["reason"])
                    for row in inventory[np.asarray(inventory["excluded"], bool)]]
        return [f"{number} {name}" + (f"[{index}]" if index >= 0 else "") + f": {reason}"
                for number, name, index, reason in rows]

    def final_product(self):
        return self.folder / "exposures.ecsv"
