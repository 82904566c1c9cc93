"""The lab notebook: products named by what made them, re-runs, the page, audit, compare.

These check the project's own contract (issue: the lab notebook) on a small
rendered scan visit; the independent references are Luigi's scheduler
summary (which tasks ran), file bytes and modification times, the FITS
checksum convention (verified by astropy) and a headless browser's view of
the page (Chromium's DOM dump and network log).
"""

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from lightledger.synthetic_data.damage import copy_visit
from lightledger.synthetic_data.render import render
from lightledger.tasks.audit import audit
from lightledger.tasks.compare import compare
from lightledger.tasks.run import reduce_visit

# stand-in figures: the figures are checked by tests/test_figures.py, here the page, the entries
# and the products are the subject
pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("quick_figures")]

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


def _snapshot(folder):
    """{name: (bytes, mtime_ns)} of every file in a stage folder."""
    return {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in Path(folder).iterdir()}


def _stage_folders(notebook, stage):
    return sorted(p for p in Path(notebook).glob(f"{stage}-*") if p.is_dir())


@pytest.fixture(scope="module")
def visit(tmp_path_factory, quick_figures, short_grid):
    root = tmp_path_factory.mktemp("notebook-visit")
    visit_toml = short_grid(render("scan-transit", root, seed=3, n_exposures=24))
    first = reduce_visit(visit_toml, workers=1)
    assert first.ok, first.messages
    return visit_toml, first


def test_second_identical_run_runs_nothing(visit):
    visit_toml, _ = visit
    again = reduce_visit(visit_toml, workers=1)
    assert again.ok
    assert again.ran == []


def test_extract_tweak_reruns_extract_bin_detrend_only(visit):
    visit_toml, first = visit
    notebook = first.final.parent.parent
    (calibrate,) = _stage_folders(notebook, "calibrate")
    before = _snapshot(calibrate)
    old_extract = _stage_folders(notebook, "extract")

    tweak = reduce_visit(visit_toml, settings=[("extract", "clip_threshold", 4.0)], workers=1)
    assert tweak.ok, tweak.messages
    # 24 exposures in chunks of 16: two extraction chunks.
    assert sorted(tweak.ran) == sorted(["ExtractReference", "ExtractChunk", "ExtractChunk",
                                        "Extract", "Bin", "Detrend"])
    assert _snapshot(calibrate) == before          # same bytes, never rewritten
    new_extract = [p for p in _stage_folders(notebook, "extract") if p not in old_extract]
    assert len(new_extract) == 1 and all(p.exists() for p in old_extract)

    doc = json.loads((notebook / "notebook.json").read_text())
    latest = [e for e in doc["entries"] if e["stage"] == "extract"][-1]
    assert latest["path"] == new_extract[0].name
    assert latest["changed"] == {"clip_threshold": [5.0, 4.0]}
    assert latest["params"]["clip_threshold"] == 4.0

    lines = compare(old_extract[0], new_extract[0])
    assert any("extract.clip_threshold: 5.0 -> 4.0" in line for line in lines)
    assert any(line.startswith("spectra: A - B per exposure and pixel") for line in lines)
    # two detrend entries of identical detrend parameters: the difference is upstream
    lines = compare(first.final.parent, tweak.final.parent)
    assert "  extract.clip_threshold: 5.0 -> 4.0" in lines
    assert not any(line.startswith(("warning", "parameters: identical")) for line in lines)
    assert any("depths (ppm)" in line for line in lines)
    assert any(line.startswith("detrended light curves: scatter out of the event") for line in lines)


def test_compare_warns_across_visits_and_events(visit, tmp_path):
    visit_toml, first = visit
    copy = tmp_path / "other"
    shutil.copytree(first.final.parent.parent.parent, copy)
    text = (copy / "visit.toml").read_text()
    text = re.sub(r'(?m)^name = "([^"]*)"', r'name = "\1, another night"', text, count=1)
    text = re.sub(r"(?m)^t0 = ([0-9.]+)", lambda m: f"t0 = {float(m.group(1)) + 0.002:.6f}", text)
    (copy / "visit.toml").write_text(text)
    other = reduce_visit(copy / "visit.toml", workers=1)
    assert other.ok, other.messages
    # the event is a fact of the later stages only: calibration and extraction are reused
    assert "Detrend" in other.ran and not {"Inventory", "Calibrate", "ExtractReference",
                                           "Extract"} & set(other.ran)
    lines = compare(first.final.parent, other.final.parent)
    assert any(line.startswith("warning: A and B come from different visits") for line in lines)
    assert any(line.startswith("warning: A and B come from different events") for line in lines)
    assert any(line.startswith("  detrend visit facts:") for line in lines)
    # a light-curve product against a depth product: told, not silently compared
    lines = compare(next(first.final.parent.parent.glob("bin-*/lightcurves.fits")), first.final)
    assert any("only the stages" in line for line in lines)


def test_until_stops_after_a_stage(raw_scan, tmp_path):
    visit_toml = copy_visit(raw_scan.parent, tmp_path / "visit")
    result = reduce_visit(visit_toml, workers=1, until="calibrate")
    assert result.ok
    assert result.final.parent.name.startswith("calibrate-")
    assert not _stage_folders(result.final.parent.parent, "extract")


def test_force_reruns_a_stage_and_keeps_the_old_entry(raw_scan, tmp_path):
    visit_toml = copy_visit(raw_scan.parent, tmp_path / "visit")
    assert reduce_visit(visit_toml, until="extract").ok
    forced = reduce_visit(visit_toml, until="extract", force=["extract"])
    assert forced.ok
    assert "Extract" in forced.ran and "CalibrateChunk" not in forced.ran
    notebook = forced.final.parent.parent
    assert [p for p in notebook.glob("extract-*.superseded-*") if p.is_dir()]


def test_audit_clean_notebook(visit):
    _, first = visit
    report = audit(first.final.parent.parent)
    assert report.problems == []
    assert report.n_products > 10
    assert any("raw or reference files" in line for line in report.lines)


def test_audit_finds_flipped_byte_replaced_and_missing_inputs(visit, tmp_path):
    _, first = visit
    copy = tmp_path / "copy"
    shutil.copytree(first.final.parent.parent.parent, copy)   # the whole visit folder
    notebook = copy / "notebook"
    assert audit(notebook).problems == []                    # relative lineage survives the copy

    (calibrate,) = _stage_folders(notebook, "calibrate")
    # 1. one flipped byte inside a calibrated frame's data
    frames = calibrate / "frames-000.fits"
    data = bytearray(frames.read_bytes())
    data[-100] ^= 0x01
    frames.write_bytes(bytes(data))
    # 2. a raw input replaced after the fact
    raw = sorted((copy / "raw").glob("*.fits"))
    shutil.copyfile(raw[1], raw[0])
    # 3. a missing input
    (calibrate / "frames-001.fits").unlink()

    problems = audit(notebook).problems
    text = "\n".join(problems)
    assert "frames-000.fits: HDU" in text and "DATASUM does not match" in text
    assert f"input {raw[0]} has changed since the product was made" in text
    assert "frames-001.fits is missing" in text
    assert "stale" in text                                    # downstream of the damage

    run = subprocess.run([sys.executable, "-m", "lightledger.tasks.cli", "audit", str(notebook)],
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 1
    assert run.stderr.count("problem: ") == len(problems)
    assert "lineage:" in run.stdout and "Traceback" not in run.stderr


def _page_requests(page, tmp_path, name):
    """URLs that a page itself asked for while Chromium loaded it (from its network log).

    Chromium's own background traffic is logged with initiator "not an
    origin"; requests made by the page carry the page's origin.
    """
    netlog = tmp_path / f"{name}.json"
    subprocess.run([CHROMIUM, *_flags(tmp_path, name), f"--log-net-log={netlog}", "--dump-dom",
                    page.as_uri()], capture_output=True, timeout=120)
    log = json.loads(netlog.read_text())
    start_job = log["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
    jobs = [e["params"] for e in log["events"] if e["type"] == start_job and "url" in e.get("params", {})]
    return [job["url"] for job in jobs if job.get("initiator") != "not an origin"]


def _flags(tmp_path, name):
    return ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            f"--user-data-dir={tmp_path / ('profile-' + name)}"]


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed")
def test_page_renders_offline_with_one_entry_per_run(visit, tmp_path):
    _, first = visit
    notebook = first.final.parent.parent
    page = notebook / "index.html"
    doc = json.loads((notebook / "notebook.json").read_text())
    shot = tmp_path / "page.png"
    subprocess.run([CHROMIUM, *_flags(tmp_path, "shot"), f"--screenshot={shot}",
                    "--window-size=1200,1600", page.as_uri()], capture_output=True, timeout=120)
    assert shot.is_file() and shot.stat().st_size > 10000
    dom = subprocess.run([CHROMIUM, *_flags(tmp_path, "dom"), "--dump-dom", page.as_uri()],
                         capture_output=True, text=True, timeout=120).stdout
    assert dom.count('<section class="entry') == len(doc["entries"]) >= 4
    for entry in doc["entries"]:
        assert f'data-entry="{entry["path"]}"' in dom

    assert _page_requests(page, tmp_path, "page") == []
    # The same check catches a page that does reach out (positive control).
    probe = tmp_path / "probe.html"
    probe.write_text(page.read_text().replace("<body>", '<body><img src="http://127.0.0.1:9/x.png">'))
    assert _page_requests(probe, tmp_path, "probe") == ["http://127.0.0.1:9/x.png"]
