"""The worked example of docs/other-conventions.md runs as written.

Files in a foreign convention (renamed keywords and extensions, reads stored as
one difference image per extension) are made from a rendered visit; the doc's
converter and profile tables then give calibrated frames identical to those of
the visit in the project's own layout (self-consistency: the same numbers read
through another layout), and a profile without one rename fails the check with
a line naming the file and the missing keyword.
"""

import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

DOC = Path(__file__).resolve().parents[1] / "docs" / "other-conventions.md"

RENAMED = {"DATE-BEG": "DATE-OBS", "XPOSURE": "EXPTIME", "SCANVEL": "SCAN_RT",
           "SUBORIGX": "CORNER_X", "SUBORIGY": "CORNER_Y"}
DROPPED = ("TIMESYS", "OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z", "INSTPROF")


def _blocks(kind):
    text = DOC.read_text(encoding="utf-8")
    return re.findall(rf"```{kind}\n(.*?)```", text, flags=re.S)


def _write_foreign(src, dst):
    """One of our raw files rewritten in the doc's foreign convention."""
    with fits.open(src) as hdul:
        header = hdul[0].header.copy()
        reads = np.asarray(hdul["READS"].data, np.float64)
        times = np.asarray(hdul["READTIME"].data, np.float64)
    primary = fits.PrimaryHDU()
    for card in header.cards:
        key = card.keyword
        if key in ("SIMPLE", "BITPIX", "NAXIS", "EXTEND", "CHECKSUM", "DATASUM") or key in DROPPED:
            continue
        primary.header[RENAMED.get(key, key)] = (card.value, card.comment)
    # float64 differences of the float32 reads are exact, so their sums give the reads back
    steps = np.diff(reads, axis=0, prepend=0.0)
    sci = []
    for k, (step, t) in enumerate(zip(steps, times), start=1):
        hdu = fits.ImageHDU(step, name="SCI", ver=k)
        hdu.header["RDTIME"] = float(t)
        sci.append(hdu)
    fits.HDUList([primary, *sci]).writeto(dst)


def _visit_copy(outdir, name, raw, profile_text):
    profile = outdir / f"{name}.toml"
    profile.write_text(profile_text)
    text = (outdir / "visit.toml").read_text()
    text = text.replace('raw = "raw"', f'raw = "{raw}"').replace(
        'profile = "instrument.toml"', f'profile = "{profile.name}"').replace(
        'notebook = "notebook"', f'notebook = "notebook-{name}"')
    visit = outdir / f"visit-{name}.toml"
    visit.write_text(text)
    return visit


@pytest.mark.slow
def test_worked_profile_reads_the_foreign_files_like_our_own(tmp_path, capsys):
    if not DOC.is_file():
        pytest.skip("docs/ is not beside the tests (installed without the source tree)")
    from lightledger.synthetic_data.render import render
    from lightledger.tasks import cli
    from lightledger.tasks.run import reduce_visit

    outdir = tmp_path / "visit"
    visit = render("scan-transit", outdir, seed=4, n_exposures=4, n_orbits=1)
    foreign = outdir / "foreign-raw"
    foreign.mkdir()
    for path in sorted((outdir / "raw").glob("*.fits")):
        _write_foreign(path, foreign / path.name)

    (python,) = _blocks("python")
    (tables,) = _blocks("toml")
    script = tmp_path / "convert.py"
    script.write_text(python)
    subprocess.run([sys.executable, str(script), str(foreign), str(outdir / "converted")], check=True)
    base = (outdir / "instrument.toml").read_text()
    converted = _visit_copy(outdir, "foreign", "converted", base + "\n" + tables)

    own = reduce_visit(visit, until="calibrate")
    other = reduce_visit(converted, until="calibrate")
    assert own.ok and other.ok, own.messages + other.messages
    mine = sorted(Path(own.final).parent.glob("frames-*.fits"))
    theirs = sorted(Path(other.final).parent.glob("frames-*.fits"))
    assert mine and len(mine) == len(theirs)
    for a, b in zip(mine, theirs):
        with fits.open(a) as ha, fits.open(b) as hb:
            for ext in ("FLUX", "VARIANCE", "FLAGS"):
                np.testing.assert_array_equal(ha[ext].data, hb[ext].data, err_msg=ext)

    # a forgotten rename: the check names a file and the keyword that is missing
    forgot = tables.replace('XPOSURE = "EXPTIME"\n', "")
    broken = _visit_copy(outdir, "forgot", "converted", base + "\n" + forgot)
    capsys.readouterr()
    assert cli.main(["check", str(broken), "--headers-only"]) == 2
    err = capsys.readouterr().err
    assert "XPOSURE" in err and ".fits" in err, err
