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


# --------------------------------------------------------------------------------------------
# a whole reduction with exposures set aside, a free-text name, an excluded channel and a
# wrong ephemeris whose results cannot be trusted
# --------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def troubled_visit(tmp_path_factory, short_grid):
    """A 24-exposure scan visit with three unusable exposures and a free-text name, reduced.

    The ephemeris is moved by 1.2 event durations, so the model's transit misses the real
    one and the residuals stay far above the noise (the detrend must say so).
    """
    import tomllib

    from lightledger.synthetic_data.damage import apply_to_file
    from lightledger.synthetic_data.render import render

    root = tmp_path_factory.mktemp("troubled")
    visit = render("scan-transit", root / "source", seed=2, n_exposures=24)
    visit = copy_visit(visit.parent, root / "visit")
    d = visit.parent
    raw = sorted((d / "raw").glob("*.fits"))
    damaged = {}
    by_name = {x.name: x for x in DAMAGES}
    for k, name in ((5, "raw-truncated-block"), (11, "exposure-all-nan"), (17, "reads-zero-reads")):
        damaged[raw[k].name] = apply_to_file(by_name[name], d, k)
    text = visit.read_text()
    doc = tomllib.loads(text)
    t0, duration = doc["event"]["t0"], doc["event"]["duration"]
    text = text.replace(f"t0 = {t0!r}", f"t0 = {t0 + 1.2 * duration!r}")
    text = text.replace(f'name = "{doc["visit"]["name"]}"', 'name = "Éclipse –\\tdamaged"', 1)
    text += '\n[exclude]\nchannels = [{channel = 2, reason = "a column of dead pixels"}]\n'
    visit.write_text(text)
    return short_grid(visit), damaged


@pytest.mark.slow
def test_reduction_sets_aside_flags_and_goes_on(troubled_visit, capsys, science):
    from astropy.table import Table

    visit, damaged = troubled_visit
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        status, lines, text = _run(["reduce", visit], capsys)
    assert status == 0, text
    assert "Traceback" not in text
    # the run's summary lists the three exposures set aside, with their reasons
    summary = text[text.index("set aside: 3 exposures"):].splitlines()[1:4]
    assert sorted(Path(l.split(": ")[0].strip()).name for l in summary) == sorted(damaged)
    assert any("truncated" in l for l in summary) and any("NaN" in l for l in summary)
    notebook = visit.parent / "notebook"
    inventory = Table.read(next(notebook.glob("calibrate-*/inventory.ecsv")), format="ascii.ecsv")
    assert len(inventory) == 24 and sorted(inventory["file"][inventory["excluded"]]) == sorted(damaged)
    assert all(inventory["reason"][inventory["excluded"]])
    lc = Table.read(next(notebook.glob("bin-*/lightcurves.fits")), hdu="LIGHTCURVES")
    # every exposure keeps its row (common practice: an observer's log lists every exposure),
    # the set-aside ones flagged with the inventory's reason and no flux
    assert list(lc["exposure"]) == list(inventory["exposure"])
    aside = np.asarray(lc["set_aside"], bool)
    assert list(aside) == list(np.asarray(inventory["excluded"], bool))
    assert list(lc["reason"][aside]) == list(inventory["reason"][inventory["excluded"]])
    assert sorted(lc["file"][aside]) == sorted(damaged)
    white = np.ma.filled(lc["white_flux"], np.nan)
    assert np.all(np.isnan(white[aside])) and np.all(lc["white_mask"][aside])
    assert np.all(np.isfinite(white[~aside]))
    det = Table.read(next(notebook.glob("detrend-*/detrended.fits")), hdu="DETRENDED")
    assert list(det["exposure"]) == list(lc["exposure"])
    assert list(det["set_aside"]) == list(aside) and not np.any(det["used"][aside])
    assert all(r.startswith("set aside: ") for r in det["reason"][aside])
    assert all(bool(r) != u for r, u in zip(det["reason"], det["used"]))    # a reason iff not used
    # the free-text name: ASCII in FITS headers, the original in JSON
    detrended = next(notebook.glob("detrend-*/detrended.fits"))
    assert fits.getheader(detrended)["LLVISIT"] == "Eclipse - damaged"
    import json
    entry = json.loads((detrended.parent / "entry.json").read_text(encoding="utf-8"))
    assert entry["visit"] == "Éclipse –\tdamaged"
    # the excluded channel keeps its row, not fitted, with the observer's reason
    depths = Table.read(detrended, hdu="DEPTHS")
    row = depths[depths["channel"] == 2][0]
    assert not row["fitted"] and np.isnan(np.ma.filled(row["depth"], np.nan))
    assert "dead pixels" in row["note"]
    # residuals far above the noise are flagged in the product, the entry, the page, the console
    white = depths[depths["channel"] == -1][0]
    assert white["noisy"] and white["rms_dof_ppm"] > 5 * white["expected_ppm"]
    assert fits.getheader(detrended, "DEPTHS")["NNOISY"] == int(np.sum(depths["noisy"])) > 0
    flagged = [l for l in lines if l.startswith("lightledger: warning: ")
               and "detrended.fits: white light curve: " in l and "residual rms" in l]
    assert len(flagged) == 1 and any("white light curve" in w for w in entry["warnings"])
    page = (notebook / "index.html").read_text(encoding="utf-8")
    assert "warning: " in page and "set aside" in page
    assert science.check_products(notebook) == []


@pytest.mark.slow
def test_set_aside_rows_leave_the_depths_as_excluding_by_hand(troubled_visit, capsys,
                                                              blank_figures):
    """Damaged exposures set aside give the depths of the same exposures excluded by hand.

    Sources: common practice (an exposure left out must not change the fit of the others,
    and a fitter needs every exposure's row with why it was left out); the by-hand
    reduction is the independent path: the intact raw files with ``[exclude] files``.
    """
    import tomllib

    from astropy.table import Table

    visit, damaged = troubled_visit
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        status, _, text = _run(["reduce", visit], capsys)        # reused when already made
        assert status == 0, text
        by_hand = copy_visit(visit.parent.parent / "source", visit.parent.parent / "by-hand")
        doc = tomllib.loads(visit.read_text())
        listed = ", ".join(f'{{file = "{name}", reason = "guiding lost"}}' for name in sorted(damaged))
        by_hand.write_text(visit.read_text().replace(
            "[exclude]\n", f"[exclude]\nfiles = [{listed}]\n", 1))
        assert doc["exclude"]["channels"]
        with blank_figures():       # (set-aside rows in the figures: the test above)
            status, _, text = _run(["reduce", by_hand], capsys)
    assert status == 0, text
    found = {}
    for name, path in (("damaged", visit), ("by hand", by_hand)):
        det_path = next((path.parent / "notebook").glob("detrend-*/detrended.fits"))
        found[name] = (Table.read(det_path, hdu="DEPTHS").filled(np.nan),
                       Table.read(det_path, hdu="DETRENDED").filled(np.nan))
    (d1, t1), (d2, t2) = found["damaged"], found["by hand"]
    # the same numbers to rounding: the set-aside rows take no part in binning or fitting
    for col in ("depth", "depth_error", "rms_ppm"):
        np.testing.assert_allclose(d1[col], d2[col], rtol=1e-9, equal_nan=True)
    assert len(t1) == len(t2) == 24
    a1, aside = np.asarray(t1["set_aside"], bool), np.asarray(t2["set_aside"], bool)
    assert int(a1.sum()) == int(aside.sum()) == 3      # (a file cut short has no time: last row)
    assert all("exclude.files" in r and "guiding lost" in r for r in t2["reason"][aside])
    np.testing.assert_allclose(t1["white_detrended"][~a1], t2["white_detrended"][~aside],
                               rtol=1e-9)
    assert np.all(np.isnan(t2["white_detrended"][aside]))
    assert np.all(np.isfinite(t2["time_bjd_tdb"][aside]))      # intact headers give the times


# --------------------------------------------------------------------------------------------
# the machine refuses: disk full, file-size limit, permission denied
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("code, words", [("ENOSPC", "no space left on the device"),
                                         ("EACCES", "permission denied")])
def test_environment_failure_inside_a_task(code, words, raw_scan, tmp_path, capsys, monkeypatch):
    """An OSError of the machine inside a task: one line naming the file, exit status 3."""
    import errno
    import os

    from lightledger.tasks import calibrate

    visit = copy_visit(raw_scan.parent, tmp_path / "visit")
    number = getattr(errno, code)

    def refuse(path, *args, **kwargs):
        raise OSError(number, os.strerror(number), str(path))

    monkeypatch.setattr(calibrate, "write_ecsv", refuse)
    status, lines, text = _run(["reduce", visit, "--until", "calibrate"], capsys)
    assert status == 3, text
    assert "Traceback" not in text
    assert len(lines) == 1 and lines[0].startswith("lightledger: error: ")
    assert "inventory.ecsv: " + words in lines[0]


@pytest.mark.slow
def test_file_size_limit(raw_scan, tmp_path):
    """A real file-size limit (RLIMIT_FSIZE): one line, exit status 3, no partial product."""
    import resource
    import subprocess
    import sys

    visit = copy_visit(raw_scan.parent, tmp_path / "visit")

    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (200_000, 200_000))

    run = subprocess.run([sys.executable, "-m", "lightledger.tasks.cli", "reduce", str(visit),
                          "--until", "calibrate"], capture_output=True, text=True, timeout=600,
                         preexec_fn=limit)
    lines = [l for l in run.stderr.splitlines() if l.startswith("lightledger")]
    assert run.returncode == 3, run.stderr
    assert "Traceback" not in run.stderr
    assert len(lines) == 1 and "file-size limit" in lines[0] and "frames-000.fits" in lines[0]
    notebook = tmp_path / "visit" / "notebook"
    assert not list(notebook.glob("calibrate-*/frames-*.fits"))
    assert not list(notebook.rglob("*.part"))


def test_a_stare_inside_its_eclipse_cannot_measure_a_depth(raw_stare, capsys):
    """The rendered 60-exposure stare lies wholly inside its eclipse: no baseline, so no depth
    (a visit like this once returned a white depth of -1,000,091 ppm with exit status 0)."""
    status, lines, _ = _run(["check", raw_stare, "--headers-only"], capsys)
    assert status == 2
    assert len(lines) == 1 and lines[0].startswith(f"lightledger: error: {raw_stare}: event: "
                                                   f"every exposure falls inside the eclipse")
    assert "--until bin" in lines[0]
    status, lines, _ = _run(["check", raw_stare, "--headers-only", "--until", "bin"], capsys)
    assert status == 0 and lines == []
