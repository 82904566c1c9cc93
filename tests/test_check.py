"""The validation pass names every problem of a visit at once, before any stage runs.

The contract checked here is the project's own (README, "Messages"): every
problem is one line ``lightledger: error: FILE: what is wrong`` naming the key,
keyword or extension; an exposure that cannot be used is set aside with its
reason and the reduction goes on; no input gives a traceback.  The damaged
inputs come from :mod:`lightledger.synthetic_data.damage` (one defect per
copy of a rendered visit); the FITS structure they break is the FITS Standard
4.0's (2880-byte blocks, header cards, END, data sizes), and astropy.io.fits
is the reference reader that each damaged file is checked against.
"""

import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

from lightledger.synthetic_data.damage import DAMAGES, copy_visit
from lightledger.tasks.check import check_visit
from lightledger.tasks.cli import main

_READS = ("exposure-", "stare-exposure-", "reads-wrapped")


def _run(args, capsys):
    """``lightledger ARGS`` in this process: exit status and the lines it printed."""
    status = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return status, [l for l in err.splitlines() if l.startswith("lightledger")], out + err


@pytest.mark.parametrize("damage", DAMAGES, ids=lambda d: d.name)
def test_damaged_visit(damage, raw_scan, raw_stare, tmp_path, capsys):
    """Each defect gives its answer, naming the damaged file and the key, without a traceback."""
    base = raw_scan if damage.scenario == "scan" else raw_stare
    visit = copy_visit(base.parent, tmp_path / "visit")
    damaged = damage.apply(tmp_path / "visit")
    args = ["check", visit]
    if not damage.name.startswith("event"):
        args += ["--until", "bin"]          # the event's coverage is checked for detrend only
    if not damage.name.startswith(_READS):
        args += ["--headers-only"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        status, lines, text = _run(args, capsys)
    assert "Traceback" not in text
    named = [l for l in lines if damaged.name in l and damage.key in l]
    if damage.outcome == "error":
        assert status == 2, text
        assert [l for l in named if l.startswith("lightledger: error: ")], text
    else:
        assert status == 0, text
        kind = "set aside: " if damage.outcome == "set aside" else ""
        assert [l for l in named if l.startswith("lightledger: warning: ") and kind in l], text
    # every line names a file (a path) or a --set option
    for line in lines:
        where = line.split(": ", 2)[2]
        assert where.startswith(("/", "--set ")), line


def test_many_defects_reported_in_one_run(raw_scan, tmp_path, capsys):
    """Five defects in profile, description, parameters and raw files: one run names all five."""
    by_name = {d.name: d for d in DAMAGES}
    visit = copy_visit(raw_scan.parent, tmp_path / "visit")
    chosen = ["profile-keyword-list", "chunk-size-nan", "channel-edges-outside",
              "xposure-negative", "readtime-nan"]
    by_name["xposure-negative"].apply(tmp_path / "visit")
    raw = sorted((tmp_path / "visit" / "raw").glob("*.fits"))
    with fits.open(raw[0]) as hdul:                       # a second raw file, READTIME broken
        hdus = [h.copy() for h in hdul]
    hdus[2] = fits.ImageHDU(np.r_[0.0, np.nan, hdus[2].data[2:]], name="READTIME")
    raw[0].unlink()
    fits.HDUList(hdus).writeto(raw[0])
    for name in chosen[:3]:
        by_name[name].apply(tmp_path / "visit")
    (tmp_path / "visit" / "visit.toml").write_text(
        (tmp_path / "visit" / "visit.toml").read_text().replace('[visit]\n',
                                                                '[visit]\non_bad_exposure = "stop"\n'))
    status, lines, text = _run(["check", visit, "--until", "bin", "--headers-only",
                                "--set", "extract.clip_threshold=nan"], capsys)
    assert status == 2
    errors = [l for l in lines if l.startswith("lightledger: error: ")]
    expected = [("instrument.toml", "keywords.TIMESYS"), ("visit.toml", "stages.calibrate.chunk_size"),
                ("visit.toml", "stages.bin.edges"), (raw[0].name, "READTIME"),
                (sorted(raw)[len(raw) // 2].name, "XPOSURE"),
                ("--set extract.clip_threshold=nan", "clip_threshold")]
    for file, key in expected:
        assert [l for l in errors if file in l and key in l], (file, key, text)
    assert len(errors) == len(expected), text


def test_reduce_stops_before_any_stage(raw_scan, tmp_path, capsys):
    """reduce runs the same pass first: nothing is written when it finds an error."""
    visit = copy_visit(raw_scan.parent, tmp_path / "visit")
    {d.name: d for d in DAMAGES}["break-threshold-nan"].apply(tmp_path / "visit")
    status, lines, text = _run(["reduce", visit, "--until", "calibrate"], capsys)
    assert status == 2
    assert lines == [f"lightledger: error: {visit}: stages.calibrate.break_threshold must be a "
                     f"finite number, not nan"]
    assert not (tmp_path / "visit" / "notebook").exists()


def test_stop_on_bad_exposure(raw_scan, tmp_path, capsys):
    """visit.on_bad_exposure = "stop": an unusable exposure is an error, not set aside."""
    visit = copy_visit(raw_scan.parent, tmp_path / "visit")
    damaged = {d.name: d for d in DAMAGES}["reads-zero-reads"].apply(tmp_path / "visit")
    status, lines, _ = _run(["check", visit, "--until", "bin", "--headers-only"], capsys)
    assert status == 0 and any("set aside" in l and damaged.name in l for l in lines)
    visit.write_text(visit.read_text().replace("[visit]\n", '[visit]\non_bad_exposure = "stop"\n'))
    status, lines, _ = _run(["check", visit, "--until", "bin", "--headers-only"], capsys)
    assert status == 2
    assert lines == [f"lightledger: error: {damaged}: extension READS holds 0 reads per exposure; "
                     f"an exposure needs at least 2"]


def test_observer_exclusions(raw_scan, tmp_path):
    """exclude.files, exposures and times set exposures aside with the observer's reasons."""
    visit = copy_visit(raw_scan.parent, tmp_path / "visit")
    report = check_visit(visit, until="bin", read_data=False)
    refs = report.refs
    assert not report.problems.items and len(refs) == 10
    mid = refs[6].start_mjd + 1e-5
    visit.write_text(visit.read_text() + f"""
[exclude]
files = [{{file = "{Path(refs[1].file).name}", reason = "guiding lost"}}]
exposures = [3, {{first = 4, last = 5}}]
times = [{{from = {mid!r}, to = {mid + 1e-5!r}, reason = "a satellite crossed"}}]
""")
    report = check_visit(visit, until="bin", read_data=False)
    assert not report.errors, report.lines()
    reasons = {r.exposure: r.reason for r in report.set_aside}
    assert sorted(reasons) == [1, 3, 4, 5, 6]
    assert reasons[1] == "excluded by the visit description (exclude.files): guiding lost"
    assert reasons[4] == "excluded by the visit description (exclude.exposures)"
    assert reasons[6].endswith("(exclude.times): a satellite crossed")
    # the observer's exclusions are not warnings: the exposures are listed, not reported
    assert not report.warnings


def test_headers_only_pass_reads_no_data(raw_stare, tmp_path):
    """--headers-only checks structure and times without reading a single exposure."""
    visit = copy_visit(raw_stare.parent, tmp_path / "visit")
    {d.name: d for d in DAMAGES}["stare-exposure-all-nan"].apply(tmp_path / "visit")
    assert not check_visit(visit, until="bin", read_data=False).set_aside
    aside = check_visit(visit, until="bin").set_aside
    assert [r.index for r in aside] == [0]
    assert aside[0].reason == "every pixel is NaN or infinite in every read"
