"""Damaged copies of a rendered visit, one defect at a time, for reliability tests.

Each :class:`Damage` applies one defect to a copy of a visit folder written by
:func:`lightledger.synthetic_data.render.render` (raw files, reference files,
the instrument profile or the visit description) and says what the reducer's
validation pass must answer: an ``"error"`` that stops the reduction, an
exposure ``"set aside"`` with its reason while the reduction goes on, or a
``"warning"``; and a piece of text (a keyword, an extension or a key) that the
answer's line must hold, next to the damaged file's name.

:func:`copy_visit` makes the copy cheaply (raw and reference files are hard
links; a damage always writes a new file in place of the link, so the
original is never touched).  The defects use no number of a particular
scenario: levels come from the copy's own instrument profile.
"""

import math
import os
import shutil
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from astropy.io import fits

__all__ = ["Damage", "DAMAGES", "copy_visit", "damage_names", "apply_to_file"]

BLOCK = 2880


@dataclass(frozen=True)
class Damage:
    """One defect and the answer expected from the validation pass.

    Attributes
    ----------
    name : str
    scenario : str
        ``"scan"`` (one exposure per file) or ``"stare"`` (4-D files).
    description : str
    apply : callable
        ``apply(visit_dir) -> Path`` damages the copy, returns the damaged file.
    outcome : str
        ``"error"``, ``"set aside"`` or ``"warning"``.
    key : str
        Text the problem's line must contain (keyword, extension or key).
    """

    name: str
    scenario: str
    description: str
    apply: Callable
    outcome: str
    key: str


def copy_visit(src, dest):
    """Copy a rendered visit folder (no notebook, no truth).

    FITS and ECSV files are hard links: never write into them, replace them
    (the damages do); the TOML documents are copies.
    """
    src, dest = Path(src), Path(dest)

    def link(a, b):
        if not str(a).endswith((".fits", ".ecsv")):     # text documents are copied
            return shutil.copy2(a, b)
        try:
            os.link(a, b)
        except OSError:
            shutil.copy2(a, b)

    shutil.copytree(src, dest, ignore=shutil.ignore_patterns("notebook", "truth.fits"),
                    copy_function=link)
    return dest / "visit.toml"


def _fresh(path, data):
    """Replace ``path`` (maybe a hard link) by a new file holding ``data``."""
    path = Path(path)
    path.unlink()
    if isinstance(data, str):
        path.write_text(data, encoding="utf-8")
    else:
        path.write_bytes(data)
    return path


def _raw(d, k=0):
    return sorted((Path(d) / "raw").glob("*.fits"))[k]


#: Raw file (index in name order) that raw-file damages hit, per visit folder; default the middle.
_TARGET = {}


def _middle_raw(d):
    files = sorted((Path(d) / "raw").glob("*.fits"))
    return files[_TARGET.get(str(Path(d).resolve()), len(files) // 2)]


def apply_to_file(damage, visit_dir, k):
    """Apply a raw-file ``damage`` to the ``k``-th raw file (name order) of ``visit_dir``."""
    key = str(Path(visit_dir).resolve())
    _TARGET[key] = k
    try:
        return damage.apply(visit_dir)
    finally:
        _TARGET.pop(key, None)


def _rewrite(path, edit):
    """Rewrite a FITS file after ``edit(hdus)`` (a list of HDU copies)."""
    with fits.open(path) as hdul:
        hdus = [h.copy() for h in hdul]
    edit(hdus)
    path.unlink()
    fits.HDUList(hdus).writeto(path, output_verify="silentfix")
    return path


def _profile(d):
    return tomllib.loads((Path(d) / "instrument.toml").read_text())


def _ref(d, role):
    return Path(d) / _profile(d)["reference_files"][role]


def _set_header(key, value, k=None):
    def apply(d):
        path = _middle_raw(d) if k is None else _raw(d, k)
        return _rewrite(path, lambda h: h[0].header.set(key, value))
    return apply


def _remove_header(key):
    def apply(d):
        return _rewrite(_middle_raw(d), lambda h: h[0].header.remove(key))
    return apply


def _hdu(hdus, name):
    return next(i for i, h in enumerate(hdus) if h.name == name)


def _replace_ext(name, make):
    """Replace extension ``name`` by ``make(old_hdu)``."""
    def apply(d):
        def edit(hdus):
            i = _hdu(hdus, name)
            hdus[i] = make(hdus[i])
        return _rewrite(_middle_raw(d), edit)
    return apply


def _drop_ext(name):
    def apply(d):
        def edit(hdus):
            del hdus[_hdu(hdus, name)]
        return _rewrite(_middle_raw(d), edit)
    return apply


def _image(data, name, header=None):
    hdu = fits.ImageHDU(np.asarray(data), name=name)
    return hdu


def _edit_reads(edit, k=None):
    """Rewrite READS with ``edit(reads, profile, bias_sub)`` (reads of one or all exposures)."""
    def apply(d):
        path = _middle_raw(d) if k is None else _raw(d, k)
        prof = _profile(d)
        hdr = fits.getheader(path, 0)
        bias = fits.getdata(_ref(d, "bias")).astype(float)
        with fits.open(path) as hdul:
            ny, nx = hdul["READS"].shape[-2:]
        y0, x0 = hdr.get("SUBORIGY", 0), hdr.get("SUBORIGX", 0)
        bias_sub = bias[y0:y0 + ny, x0:x0 + nx]

        def change(hdus):
            i = _hdu(hdus, "READS")
            reads = np.array(hdus[i].data, dtype=np.float64)
            target = reads[0] if reads.ndim == 4 else reads
            new = edit(target, prof, bias_sub)
            if reads.ndim == 4:
                reads[0] = new
            else:
                reads = new
            hdus[i] = fits.ImageHDU(reads.astype(np.float32), name="READS")
        return _rewrite(path, change)
    return apply


def _bytes(edit, k=None):
    def apply(d):
        path = _middle_raw(d) if k is None else _raw(d, k)
        return _fresh(path, edit(path.read_bytes(), path))
    return apply


def _zero_header(name):
    def edit(data, path):
        with fits.open(path) as hdul:
            i = [h.name for h in hdul].index(name)
            info = hdul.fileinfo(i)
        b = bytearray(data)
        b[info["hdrLoc"]:info["datLoc"]] = b"\0" * (info["datLoc"] - info["hdrLoc"])
        return bytes(b)
    return edit


def _card_bytes(key, text):
    def edit(data, path):
        i = data.find(key.ljust(8).encode() + b"=")
        b = bytearray(data)
        b[i:i + 80] = text.encode().ljust(80)
        return bytes(b)
    return edit


def _uint16_storage(d):
    """READS in unsigned 16-bit storage after a brighter source overflowed it.

    The signal above bias is scaled so that the brightest read would be
    70000 ADU; stored modulo 2**16, those reads wrap around to small values.
    """
    path = _middle_raw(d)
    hdr = fits.getheader(path, 0)
    bias = fits.getdata(_ref(d, "bias")).astype(float)

    def change(hdus):
        i = _hdu(hdus, "READS")
        reads = np.array(hdus[i].data, dtype=np.float64)
        ny, nx = reads.shape[-2:]
        y0, x0 = hdr.get("SUBORIGY", 0), hdr.get("SUBORIGX", 0)
        b = bias[y0:y0 + ny, x0:x0 + nx]
        above = reads - b
        k = np.unravel_index(np.nanargmax(above), above.shape)
        scale = (70000.0 - b[k[-2:]]) / above[k]
        stored = np.mod(np.round(b + above * max(scale, 1.0)), 65536).astype(np.uint16)
        hdus[i] = fits.ImageHDU(stored, name="READS")
    return _rewrite(path, change)


def _duplicate_file(d):
    src = _middle_raw(d)
    dest = src.with_name("zz-copy-of-" + src.name)
    shutil.copy(src, dest)
    return dest


def _subarray_outside(d):
    prof = _profile(d)
    ny, nx = prof["detector"]["full_shape"]
    for path in sorted((Path(d) / "raw").glob("*.fits")):
        _rewrite(path, lambda h: h[0].header.set("SUBORIGX", int(nx) - 10))
    return _raw(d, 0)


def _smaller_frame(d):
    def change(hdus):
        i = _hdu(hdus, "READS")
        data = np.array(hdus[i].data)
        hdus[i] = fits.ImageHDU(data[..., :-4, :], name="READS")
    return _rewrite(_middle_raw(d), change)


def _reference(role, edit):
    def apply(d):
        path = _ref(d, role)
        data = np.array(fits.getdata(path), dtype=np.float64)
        return _fresh_fits(path, edit(data, d))
    return apply


def _fresh_fits(path, data):
    path.unlink()
    fits.PrimaryHDU(data).writeto(path)
    return path


def _subarray_block(data, d, value, rows=8, cols=40):
    """Set a block of the reference inside the first raw file's subarray to ``value``."""
    hdr = fits.getheader(_raw(d, 0), 0)
    with fits.open(_raw(d, 0)) as hdul:
        ny, nx = hdul["READS"].shape[-2:]
    y0, x0 = hdr.get("SUBORIGY", 0) + ny // 2 - rows // 2, hdr.get("SUBORIGX", 0) + nx // 3
    data[..., y0:y0 + rows, x0:x0 + cols] = value
    return data


def _profile_text(edit):
    def apply(d):
        path = Path(d) / "instrument.toml"
        return _fresh(path, edit(path.read_text()))
    return apply


def _visit_text(edit):
    def apply(d):
        path = Path(d) / "visit.toml"
        return _fresh(path, edit(path.read_text()))
    return apply


def _toml_set(table, key, value):
    """Set ``key = value`` (TOML text) in ``[table]`` of a document's text."""
    def edit(text):
        lines = text.splitlines()
        start = lines.index(f"[{table}]")
        end = next((i for i in range(start + 1, len(lines)) if lines[i].startswith("[")), len(lines))
        for i in range(start + 1, end):
            if lines[i].split("=")[0].strip() == key:
                lines[i] = f"{key} = {value}"
                break
        else:
            lines.insert(start + 1, f"{key} = {value}")
        return "\n".join(lines) + "\n"
    return edit


def _append(text):
    return lambda doc: doc + "\n" + text + "\n"


def _ephemeris_far(text):
    """Move the event half a period away from the visit."""
    doc = tomllib.loads(text)
    ev = doc["event"]
    return _toml_set("event", "t0", repr(ev["t0"] + 0.5 * ev["period"]))(text)


def _t0_reduced(text):
    doc = tomllib.loads(text)
    return _toml_set("event", "t0", repr(doc["event"]["t0"] - 2400000.0))(text)


def _edges_outside(text):
    return _toml_set("stages.bin", "edges", "[0.2, 0.3, 0.4]")(text)


def _edges_decreasing(text):
    return _toml_set("stages.bin", "edges", "[1.5, 1.4, 1.3]")(text)


D = Damage
DAMAGES = [
    # --- raw files: structure
    D("raw-truncated-block", "scan", "a raw file missing its last 2880-byte block",
      _bytes(lambda b, p: b[:-BLOCK]), "set aside", "truncated"),
    D("raw-truncated-header", "scan", "a raw file cut inside its first header",
      _bytes(lambda b, p: b[:1000]), "set aside", "truncated"),
    D("raw-empty", "scan", "an empty raw file", _bytes(lambda b, p: b""), "set aside", "empty"),
    D("raw-not-fits", "scan", "a text file named .fits",
      _bytes(lambda b, p: b"this is not a FITS file\n" * 200), "set aside", "not a FITS file"),
    D("raw-zeroed-reads-header", "scan", "the READS extension header zeroed",
      _bytes(_zero_header("READS")), "set aside", "HDU 1 header"),
    D("raw-zeroed-readtime-header", "scan", "the READTIME extension header zeroed",
      _bytes(_zero_header("READTIME")), "set aside", "HDU 2 header"),
    D("raw-non-ascii-header", "scan", "a byte 0xe9 in the primary header",
      _bytes(lambda b, p: b[:100] + b"\xe9" + b[101:]), "set aside", "primary header"),
    D("raw-junk-tail", "scan", "junk bytes after the last HDU",
      _bytes(lambda b, p: b + b"garbage"), "set aside", "after the last HDU"),
    # --- raw files: extensions
    D("reads-binary-table", "scan", "READS stored as a binary table",
      _replace_ext("READS", lambda h: fits.BinTableHDU.from_columns(
          [fits.Column(name="reads", format="E", array=np.ravel(h.data)[:100])], name="READS")),
      "set aside", "READS"),
    D("reads-zero-reads", "scan", "READS with zero reads",
      _replace_ext("READS", lambda h: _image(np.zeros((0,) + h.data.shape[1:], np.float32),
                                             "READS")), "set aside", "READS"),
    D("reads-one-read", "scan", "READS with a single read",
      _replace_ext("READS", lambda h: _image(h.data[:1], "READS")), "set aside", "READS"),
    D("reads-2d", "scan", "READS of one read as a 2-D image",
      _replace_ext("READS", lambda h: _image(h.data[0], "READS")), "set aside", "READS"),
    D("reads-missing", "scan", "no READS extension", _drop_ext("READS"), "set aside", "READS"),
    D("readtime-missing", "scan", "no READTIME extension", _drop_ext("READTIME"),
      "set aside", "READTIME"),
    D("readtime-nan", "scan", "a NaN in READTIME",
      _replace_ext("READTIME", lambda h: _image(np.where(np.arange(h.data.size) == 2, np.nan,
                                                         h.data), "READTIME")),
      "set aside", "READTIME"),
    D("readtime-not-from-zero", "scan", "READTIME starting at 3 s",
      _replace_ext("READTIME", lambda h: _image(h.data + 3.0, "READTIME")), "set aside", "READTIME"),
    D("readtime-decreasing", "scan", "READTIME decreasing",
      _replace_ext("READTIME", lambda h: _image(np.r_[0.0, h.data[1:][::-1]], "READTIME")),
      "set aside", "READTIME"),
    D("readtime-short", "scan", "READTIME with one value too few",
      _replace_ext("READTIME", lambda h: _image(h.data[:-1], "READTIME")), "set aside", "READTIME"),
    D("startoff-missing", "stare", "4-D READS without STARTOFF", _drop_ext("STARTOFF"),
      "set aside", "STARTOFF"),
    D("startoff-nan", "stare", "a NaN in STARTOFF",
      _replace_ext("STARTOFF", lambda h: _image(np.where(np.arange(h.data.size) == 3, np.nan,
                                                         h.data), "STARTOFF")),
      "set aside", "STARTOFF"),
    D("startoff-short", "stare", "STARTOFF with one value too few",
      _replace_ext("STARTOFF", lambda h: _image(h.data[:-1], "STARTOFF")), "set aside", "STARTOFF"),
    # --- raw files: primary header
    D("date-beg-unterminated", "scan", "a DATE-BEG card with an unterminated string",
      _bytes(_card_bytes("DATE-BEG", "DATE-BEG= '2024-01-01T00:00:00")), "set aside", "DATE-BEG"),
    D("date-beg-missing", "scan", "no DATE-BEG", _remove_header("DATE-BEG"), "set aside", "DATE-BEG"),
    D("date-beg-not-iso", "scan", "DATE-BEG = 'yesterday'", _set_header("DATE-BEG", "yesterday"),
      "set aside", "DATE-BEG"),
    D("date-beg-number", "scan", "DATE-BEG = 60000.5", _set_header("DATE-BEG", 60000.5),
      "set aside", "DATE-BEG"),
    D("timesys-tt", "scan", "TIMESYS = 'TT'", _set_header("TIMESYS", "TT"), "set aside", "TIMESYS"),
    D("xposure-negative", "scan", "XPOSURE = -84", _set_header("XPOSURE", -84.0),
      "set aside", "XPOSURE"),
    D("xposure-text", "scan", "XPOSURE = 'long'", _set_header("XPOSURE", "long"),
      "set aside", "XPOSURE"),
    D("xposure-missing", "scan", "no XPOSURE", _remove_header("XPOSURE"), "set aside", "XPOSURE"),
    D("scanvel-missing", "scan", "no SCANVEL", _remove_header("SCANVEL"), "set aside", "SCANVEL"),
    D("scanvel-text", "scan", "SCANVEL = 'fast'", _set_header("SCANVEL", "fast"),
      "set aside", "SCANVEL"),
    D("suborig-negative", "scan", "SUBORIGX = -5", _set_header("SUBORIGX", -5),
      "set aside", "SUBORIGX"),
    D("suborig-fraction", "scan", "SUBORIGY = 1.5", _set_header("SUBORIGY", 1.5),
      "set aside", "SUBORIGY"),
    D("obsgeo-partial", "scan", "OBSGEO-X without OBSGEO-Y/Z",
      lambda d: _rewrite(_middle_raw(d), lambda h: [h[0].header.remove(k, ignore_missing=True)
                                                   for k in ("OBSGEO-Y", "OBSGEO-Z")]),
      "set aside", "OBSGEO"),
    D("obsgeo-kilometres", "scan", "OBSGEO-X/Y/Z in kilometres",
      lambda d: _rewrite(_middle_raw(d), lambda h: [h[0].header.set(k, h[0].header[k] / 1000.0)
                                                   for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z")]),
      "set aside", "OBSGEO"),
    # --- raw files: the visit
    D("duplicate-file", "scan", "one raw file copied under another name", _duplicate_file,
      "set aside", "same time"),
    D("frame-shape-differs", "scan", "one file with 4 rows fewer", _smaller_frame,
      "set aside", "frame shape"),
    D("subarray-outside", "scan", "every file's SUBORIGX beyond the reference files",
      _subarray_outside, "error", "SUBORIGX"),
    # --- raw files: the reads
    D("exposure-all-nan", "scan", "every read of an exposure NaN",
      _edit_reads(lambda r, p, b: np.full_like(r, np.nan)), "set aside", "NaN"),
    D("exposure-all-saturated", "scan", "every read of an exposure above saturation",
      _edit_reads(lambda r, p, b: np.broadcast_to(b + p["detector"]["saturation"] + 100.0,
                                                  r.shape).copy()), "set aside", "saturated"),
    D("exposure-clipped-after-first-read", "scan", "every read after the first equal to it",
      _edit_reads(lambda r, p, b: np.broadcast_to(r[0], r.shape).copy()), "set aside", "clipped"),
    D("stare-exposure-all-nan", "stare", "every read of one exposure of a 4-D file NaN",
      _edit_reads(lambda r, p, b: np.full_like(r, np.nan)), "set aside", "NaN"),
    D("reads-wrapped-uint16", "scan", "READS in 16-bit storage that wrapped around",
      _uint16_storage, "warning", "wrapped"),
    # --- reference files
    D("bias-all-nan", "scan", "an all-NaN bias",
      _reference("bias", lambda a, d: np.full_like(a, np.nan)), "error", "bias"),
    D("dark-all-nan", "scan", "an all-NaN dark",
      _reference("dark", lambda a, d: np.full_like(a, np.nan)), "error", "dark"),
    D("flat-all-nan", "scan", "an all-NaN flat",
      _reference("flat", lambda a, d: np.full_like(a, np.nan)), "error", "flat"),
    D("flat-zero-block", "scan", "a flat with a block of zeros on the spectrum",
      _reference("flat", lambda a, d: _subarray_block(a, d, 0.0)), "warning", "flat"),
    D("flat-nan-block", "scan", "a flat with a block of NaN",
      _reference("flat", lambda a, d: _subarray_block(a, d, np.nan)), "warning", "flat"),
    D("dark-nan-block", "scan", "a dark with a block of NaN",
      _reference("dark", lambda a, d: _subarray_block(a, d, np.nan)), "warning", "dark"),
    D("bias-wrong-shape", "scan", "a bias of the wrong shape",
      _reference("bias", lambda a, d: a[:-1]), "error", "full_shape"),
    D("nonlinearity-2d", "scan", "a 2-D non-linearity reference",
      _reference("nonlinearity", lambda a, d: a[0]), "error", "nonlinearity"),
    D("bad-pixels-all", "scan", "a bad-pixel map marking every pixel",
      _reference("bad_pixels", lambda a, d: np.ones_like(a)), "error", "bad"),
    D("reference-truncated", "scan", "a truncated dark file",
      lambda d: _fresh(_ref(d, "dark"), _ref(d, "dark").read_bytes()[:-BLOCK]), "error", "dark"),
    D("throughput-no-column", "scan", "a throughput table without its throughput column",
      lambda d: _fresh(_ref(d, "throughput"),
                       _ref(d, "throughput").read_text().replace("throughput", "transmission")),
      "error", "throughput"),
    # --- instrument profile
    D("profile-not-utf8", "scan", "a non-UTF-8 byte in the profile",
      lambda d: _fresh(Path(d) / "instrument.toml",
                       (Path(d) / "instrument.toml").read_bytes().replace(b"fictional", b"fict\xefonal")),
      "error", "UTF-8"),
    D("profile-keyword-list", "scan", "[keywords] TIMESYS = []",
      _profile_text(_append("[keywords]\nTIMESYS = []")), "error", "keywords.TIMESYS"),
    D("profile-keyword-number", "scan", "[keywords] SCANVEL = 0.0",
      _profile_text(_append("[keywords]\nSCANVEL = 0.0")), "error", "keywords.SCANVEL"),
    D("profile-extension-number", "scan", "[extensions] READS = 7",
      _profile_text(_append("[extensions]\nREADS = 7")), "error", "extensions.READS"),
    D("profile-keyword-collision", "scan", "[keywords] SCANVEL = 'XPOSURE'",
      _profile_text(_append('[keywords]\nSCANVEL = "XPOSURE"')), "error", "keywords"),
    D("profile-dispersion-nan", "scan", "a NaN dispersion coefficient",
      _profile_text(lambda t: _toml_set("dispersion", "coefficients", "[nan, 0.005]")(t)),
      "error", "dispersion.coefficients"),
    D("profile-dispersion-decreasing", "scan", "a dispersion that decreases over the subarray",
      _profile_text(lambda t: _toml_set("dispersion", "coefficients", "[1.3, -0.004]")(t)),
      "error", "dispersion.coefficients"),
    D("profile-gain-zero", "scan", "detector.gain = 0",
      _profile_text(lambda t: _toml_set("detector", "gain", "0.0")(t)), "error", "detector.gain"),
    D("profile-saturation-inf", "scan", "detector.saturation = inf",
      _profile_text(lambda t: _toml_set("detector", "saturation", "inf")(t)),
      "error", "detector.saturation"),
    D("profile-full-shape", "scan", "detector.full_shape with three numbers",
      _profile_text(lambda t: _toml_set("detector", "full_shape", "[256, 512, 3]")(t)),
      "error", "detector.full_shape"),
    D("profile-flat-range-reversed", "scan", "flat.wavelength_range reversed",
      _profile_text(lambda t: _toml_set("flat", "wavelength_range", "[1.7, 1.1]")(t)),
      "error", "flat.wavelength_range"),
    D("profile-reference-missing", "scan", "a reference file that does not exist",
      lambda d: _ref(d, "dark").unlink() or Path(d) / "instrument.toml", "error",
      "reference_files.dark"),
    D("profile-unknown-key", "scan", "a misspelt profile key",
      _profile_text(lambda t: t.replace("read_noise", "readnoise")), "error", "detector.readnoise"),
    # --- visit description
    D("visit-not-utf8", "scan", "a non-UTF-8 byte in the visit description",
      lambda d: _fresh(Path(d) / "visit.toml",
                       (Path(d) / "visit.toml").read_bytes().replace(b"[target]", b"[target]\n# \xff")),
      "error", "UTF-8"),
    D("visit-bad-toml", "scan", "a TOML syntax error", _visit_text(lambda t: t.replace("[event]", "[event")),
      "error", "not valid TOML"),
    D("chunk-size-nan", "scan", "stages.calibrate.chunk_size = nan",
      _visit_text(_toml_set("stages.calibrate", "chunk_size", "nan")), "error",
      "stages.calibrate.chunk_size"),
    D("chunk-size-inf", "scan", "stages.calibrate.chunk_size = inf",
      _visit_text(_toml_set("stages.calibrate", "chunk_size", "inf")), "error",
      "stages.calibrate.chunk_size"),
    D("break-threshold-nan", "scan", "stages.calibrate.break_threshold = nan",
      _visit_text(_toml_set("stages.calibrate", "break_threshold", "nan")), "error",
      "stages.calibrate.break_threshold"),
    D("clip-threshold-nan", "scan", "stages.extract.clip_threshold = nan",
      _visit_text(_toml_set("stages.extract", "clip_threshold", "nan")), "error",
      "stages.extract.clip_threshold"),
    D("channel-edges-outside", "scan", "channel edges outside the spectrum",
      _visit_text(_edges_outside), "error", "stages.bin.edges"),
    D("channel-edges-decreasing", "scan", "decreasing channel edges",
      _visit_text(_edges_decreasing), "error", "stages.bin.edges"),
    D("white-range-outside", "scan", "a white band outside the spectrum",
      _visit_text(_toml_set("stages.bin", "white_range", "[2.5, 3.0]")), "error",
      "stages.bin.white_range"),
    D("event-outside-visit", "scan", "an ephemeris that puts the event outside the visit",
      _visit_text(_ephemeris_far), "error", "event"),
    D("event-t0-reduced", "scan", "t0 given as BJD - 2400000",
      _visit_text(_t0_reduced), "error", "event.t0"),
    D("visit-ra-range", "scan", "target.ra = 400", _visit_text(_toml_set("target", "ra", "400.0")),
      "error", "target.ra"),
    D("visit-period-negative", "scan", "event.period = -2",
      _visit_text(_toml_set("event", "period", "-2.0")), "error", "event.period"),
    D("visit-missing-table", "scan", "no [event] table",
      _visit_text(lambda t: t.replace("[event]", "[eventual]")), "error", "eventual"),
    D("visit-raw-missing", "scan", "visit.raw naming a missing folder",
      _visit_text(_toml_set("visit", "raw", '"nowhere"')), "error", "visit.raw"),
    D("visit-on-bad-exposure", "scan", "visit.on_bad_exposure = 'skip'",
      _visit_text(_toml_set("visit", "on_bad_exposure", '"skip"')), "error",
      "visit.on_bad_exposure"),
    D("exclude-unknown-file", "scan", "exclude.files naming no raw file",
      _visit_text(_append('[exclude]\nfiles = ["nothing.fits"]')), "error", "exclude.files"),
    D("exclude-exposure-range", "scan", "exclude.exposures beyond the visit",
      _visit_text(_append("[exclude]\nexposures = [100000]")), "error", "exclude.exposures"),
    D("exclude-bad-time", "scan", "exclude.times with a time that is not a time",
      _visit_text(_append('[exclude]\ntimes = [{from = "noon", to = "1pm"}]')), "error",
      "exclude.times"),
]


def damage_names():
    return [d.name for d in DAMAGES]
