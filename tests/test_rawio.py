"""Reading raw visits in the raw exposure layout, directly and through a renaming profile.

The layout (README, "Raw exposure layout") uses FITS Standard 4.0 time
keywords (DATE-BEG, XPOSURE, TIMESYS, OBSGEO-X/Y/Z); astropy.io.fits is the
reference reader: every value the inventory reports is compared with what
astropy reads straight from the files.
"""

import shutil
import subprocess
import sys

import numpy as np
import pytest
from astropy.io import fits
from astropy.time import Time

from lightledger.pipeline.errors import InputFileError
from lightledger.tasks.config import load_visit
from lightledger.tasks.rawio import inventory, read_exposure

RENAMED_KEYWORDS = {"DATE-BEG": "DATE-OBS", "XPOSURE": "EXPTIME", "SCANVEL": "SCANRATE",
                    "SUBORIGX": "COLSTART", "SUBORIGY": "ROWSTART"}
RENAMED_EXTENSIONS = {"READS": "RAMPDATA", "READTIME": "RAMPTIME", "STARTOFF": "EXPBEGIN"}


@pytest.fixture(scope="module")
def scan(raw_scan):
    return load_visit(raw_scan)


@pytest.fixture(scope="module")
def stare(raw_stare):
    return load_visit(raw_stare)


def test_three_dimensional_files(scan):
    refs = inventory(scan.raw, scan.profile)
    files = sorted(scan.raw.glob("*.fits"))
    assert len(refs) == len(files) == 10
    for ref in refs:
        with fits.open(ref.file) as hdul:
            hdr = hdul[0].header
            assert ref.index == -1
            assert ref.start_mjd == pytest.approx(Time(hdr["DATE-BEG"], scale="utc").mjd, abs=1e-9)
            assert ref.scan_velocity == hdr["SCANVEL"]
            assert ref.origin == (hdr["SUBORIGX"], hdr["SUBORIGY"])
            assert ref.obsgeo == (hdr["OBSGEO-X"], hdr["OBSGEO-Y"], hdr["OBSGEO-Z"])
            np.testing.assert_array_equal(read_exposure(ref, scan.profile), hdul["READS"].data)
    assert np.all(np.diff([r.start_mjd for r in refs]) > 0)
    # Scans alternate direction, forward then reverse.
    assert {np.sign(r.scan_velocity) for r in refs} == {-1.0, 1.0}


def test_exposures_ordered_by_time_not_name(scan, tmp_path):
    raw = tmp_path / "raw"
    raw.mkdir()
    files = sorted(scan.raw.glob("*.fits"))
    for i, f in enumerate(files):   # reverse the names
        shutil.copy(f, raw / f"z{len(files) - i:03d}.fits")
    refs = inventory(raw, scan.profile)
    assert [r.file.split("/")[-1] for r in refs] == [f"z{len(files) - i:03d}.fits"
                                                    for i in range(len(files))]


def test_four_dimensional_files(stare):
    refs = inventory(stare.raw, stare.profile)
    assert len(refs) == 60
    for path in sorted(stare.raw.glob("*.fits")):
        with fits.open(path) as hdul:
            start = Time(hdul[0].header["DATE-BEG"], scale="utc").mjd
            offsets = hdul["STARTOFF"].data
            mine = [r for r in refs if r.file == str(path)]
            assert [r.index for r in mine] == list(range(hdul["READS"].shape[0]))
            for r in mine:
                assert r.start_mjd == pytest.approx(start + offsets[r.index] / 86400, abs=1e-9)
            k = mine[-1].index
            np.testing.assert_array_equal(read_exposure(mine[-1], stare.profile), hdul["READS"].data[k])
    assert all(r.obsgeo is None for r in refs)


def _renamed_copy(visit, dest):
    """Copy a visit, renaming keywords and extensions, and write a profile that maps them."""
    shutil.copytree(visit.path.parent, dest, ignore=shutil.ignore_patterns("notebook"))
    for path in sorted((dest / "raw").glob("*.fits")):
        with fits.open(path) as hdul:
            hdus = [h.copy() for h in hdul]
        for ours, theirs in RENAMED_KEYWORDS.items():
            if ours in hdus[0].header:
                hdus[0].header.rename_keyword(ours, theirs)
        for hdu in hdus[1:]:
            hdu.name = RENAMED_EXTENSIONS.get(hdu.name, hdu.name)
        fits.HDUList(hdus).writeto(path, overwrite=True, checksum=True)
    profile = dest / visit.profile.path.name
    text = profile.read_text()
    text += "\n[keywords]\n" + "".join(f'{k} = "{v}"\n' for k, v in RENAMED_KEYWORDS.items())
    text += "\n[extensions]\n" + "".join(f'{k} = "{v}"\n' for k, v in RENAMED_EXTENSIONS.items())
    profile.write_text(text)
    return load_visit(dest / "visit.toml")


@pytest.mark.parametrize("which", ["scan", "stare"])
def test_renamed_copy_reads_the_same(which, scan, stare, tmp_path):
    visit = {"scan": scan, "stare": stare}[which]
    copy = _renamed_copy(visit, tmp_path / "renamed")
    with fits.open(sorted(copy.raw.glob("*.fits"))[0]) as hdul:
        assert "DATE-BEG" not in hdul[0].header and "RAMPDATA" in hdul
    original = inventory(visit.raw, visit.profile)
    renamed = inventory(copy.raw, copy.profile)
    assert len(original) == len(renamed)
    for a, b in zip(original, renamed):
        assert (a.start_mjd, a.read_times, a.scan_velocity, a.origin, a.obsgeo, a.index) == \
               (b.start_mjd, b.read_times, b.scan_velocity, b.origin, b.obsgeo, b.index)
    np.testing.assert_array_equal(read_exposure(original[3], visit.profile),
                                  read_exposure(renamed[3], copy.profile))
    # Without the profile's renames the same files are rejected with a clear message.
    with pytest.raises(InputFileError, match="primary header has no DATE-BEG keyword"):
        inventory(copy.raw, visit.profile)


def _damage(visit, tmp_path, edit):
    dest = tmp_path / "damaged"
    shutil.copytree(visit.path.parent, dest, ignore=shutil.ignore_patterns("notebook"))
    path = sorted((dest / "raw").glob("*.fits"))[0]
    with fits.open(path) as hdul:
        hdus = [h.copy() for h in hdul]
    edit(hdus)
    fits.HDUList(hdus).writeto(path, overwrite=True)
    return load_visit(dest / "visit.toml"), path


def test_bad_files_get_one_line_errors(scan, stare, tmp_path):
    v, path = _damage(scan, tmp_path / "a", lambda h: h[0].header.remove("XPOSURE"))
    with pytest.raises(InputFileError, match=f"{path.name}: primary header has no XPOSURE keyword"):
        inventory(v.raw, v.profile)
    v, path = _damage(scan, tmp_path / "b", lambda h: h[0].header.set("DATE-BEG", "yesterday"))
    with pytest.raises(InputFileError, match="DATE-BEG 'yesterday' is not an ISO-8601 time"):
        inventory(v.raw, v.profile)
    v, path = _damage(stare, tmp_path / "c", lambda h: h.pop(-1) if h[-1].name == "STARTOFF"
                      else h.remove(next(x for x in h if x.name == "STARTOFF")))
    with pytest.raises(InputFileError, match=f"{path.name}: no STARTOFF extension"):
        inventory(v.raw, v.profile)


def _cli(*args, cwd):
    return subprocess.run([sys.executable, "-m", "lightledger.tasks.cli", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=300)


def test_command_line_errors_are_one_line(scan, tmp_path):
    run = _cli("reduce", str(tmp_path / "missing.toml"), cwd=tmp_path)
    assert run.returncode == 2
    assert run.stderr.strip() == f"lightledger: error: {tmp_path / 'missing.toml'}: visit description not found"

    v, path = _damage(scan, tmp_path / "t", lambda h: None)
    path.write_bytes(path.read_bytes()[:5000])    # a truncated raw file
    # a visit that stops at a bad exposure instead of setting it aside
    v.path.write_text(v.path.read_text().replace("[visit]\n", '[visit]\non_bad_exposure = "stop"\n'))
    run = _cli("reduce", str(v.path), cwd=tmp_path)
    assert run.returncode == 2, run.stderr
    lines = [line for line in run.stderr.strip().splitlines() if "exposures read" not in line]
    assert len(lines) == 1 and lines[0].startswith("lightledger: error: ") and path.name in lines[0]
    assert "truncated" in lines[0]
    assert "Traceback" not in run.stderr
    assert not (v.notebook.exists() and any(v.notebook.rglob("*.fits")))

    run = _cli("reduce", str(v.path), "--set", "extract.clip_thresold=3", cwd=tmp_path)
    assert run.returncode == 2
    assert "did you mean 'clip_threshold'" in run.stderr and "Traceback" not in run.stderr
