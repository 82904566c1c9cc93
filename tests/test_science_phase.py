"""End to end: a programme of two visits (phase-pair) rendered, reduced and fitted jointly.

A small render (3 orbits of 9 exposures per visit, four channels) keeps the suite
fast; the scenarios at their default sizes are the benchmark's
(tests/benchmarks/bench_phase.py).  Sources: the forward model's truth (never read
by the reducer), the FITS standard and checksum convention (check_products in
conftest.py), Luigi's own record of the tasks it ran.
"""

import re
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

pytestmark = pytest.mark.slow

EDGES = [1.31, 1.45, 1.6, 1.78, 1.99]
SETTINGS = [("bin", "edges", tuple(EDGES))]     # as tests/conftest.py's phase_programme
#: The programme's: a joint grid of two models keeps the suite short (the default grid is
#: the benchmark's).
JOINT_MODELS = ("visit1+orbit2+scan+ramp", "visit1+orbit1+scan+ramp")
PROGRAMME_SETTINGS = SETTINGS + [("joint", "models", JOINT_MODELS)]


@pytest.fixture(scope="module")
def pair(phase_programme):
    # the shared render (tests/conftest.py), reduced with this module's settings
    assert phase_programme.programme_settings == PROGRAMME_SETTINGS
    return phase_programme.out, phase_programme.programme, phase_programme.result


def test_programme_products_pages_and_truth(pair, science):
    # Products: valid FITS with checksums (check_products: FITS Standard 4.0, checksum
    # convention, fitsverify), every phase-curve column documented in the README, the
    # programme page linking each visit's page.  Science against the truth (truth.py):
    # the white day side and night side within 3 sigma, and the detrended eclipse visit
    # (flux over the systematics alone, star alone = 1) keeping the injected
    # astrophysical signal: its mean level within 3 times the noise of the truth's (a
    # curve normalised out of eclipse, with the planet's variation divided out, sits about
    # 1000 ppm = 12 times the noise away), an rms difference below 4 times the noise (the
    # fitted systematics of two short orbits carry the phase curve's uncertainty) and a
    # correlation above 0.9.
    from lightledger.tasks import phasecolumns, phasecurve

    out, programme, result = pair
    families = {f for f, _ in result.ran_tasks}
    assert {"Calibrate", "Extract", "Bin", "JointDetrend"} <= families
    assert "Detrend" not in families            # the joint fit replaces the visits' detrend
    folder = Path(result.final).parent
    names = [h.name for h in fits.open(result.final)]
    for ext in ("PLANET", "DAYNIGHT", "PHASEBINS", "ALONE", "CONSISTENCY", "PHASE_WHITE",
                "PHASE_00", "PHASE_03"):
        assert ext in names
    for stem in ("detrended-1", "detrended-2", "planet", "daynight", "phasebins", "alone",
                 "consistency", "phasecurve-white", "phasecurve-03"):
        assert (folder / f"{stem}.fits").is_file() or (folder / f"{stem}.ecsv").is_file()
    for fig in ("phasecurve.png", "phasecurve-channels.png", "phasespectra.png", "residuals.png"):
        assert (folder / fig).stat().st_size > 10_000
    problems = science.check_products(out / "notebook")
    for visit in ("visit-eclipse", "visit-transit"):
        problems += science.check_products(out / visit / "notebook")
    assert not problems, "\n".join(problems[:20])

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    for table in (phasecurve.DETRENDED_COLUMNS, phasecurve.PLANET_COLUMNS,
                  phasecurve.PHASE_COLUMNS, phasecurve.BIN_COLUMNS, phasecurve.DAYNIGHT_COLUMNS,
                  phasecurve.ALONE_COLUMNS, phasecurve.CONSISTENCY_COLUMNS,
                  phasecolumns.COEFFICIENT_COLUMNS):
        assert [c for c in table if f"`{c}`" not in readme] == []

    # The joint grid: every model fitted to both visits, ranked per light curve, the planet
    # marginalised over it (Wakeford et al. 2016: weights exp(-BIC/2) normalised, a
    # channel's times the white band's weight as the models' prior, Bayes' theorem; the
    # weighted mean, an error adding the spread between models), checked against the GRID
    # table the product carries; the programme page shows it.
    planet = Table.read(result.final, hdu="PLANET")
    grid = Table.read(result.final, hdu="GRID")
    assert set(grid["model"]) == set(JOINT_MODELS) and len(grid) == 2 * len(planet)
    white = {int(r["model_index"]): float(r["weight"]) for r in grid[grid["channel"] == -1]}
    for row in planet:
        rows = grid[grid["channel"] == row["channel"]]
        w = np.asarray(rows["weight"], float)
        bic = np.asarray(rows["bic"], float)
        assert abs(w.sum() - 1) < 1e-9
        prior = np.array([1.0 if row["channel"] == -1 else white[int(m)]
                          for m in rows["model_index"]])
        like = prior * np.exp(-(bic - bic.min()) / 2)
        assert w == pytest.approx(like / like.sum(), rel=1e-9, abs=1e-15)
        d, e = np.asarray(rows["eclipse_depth"], float), np.asarray(rows["eclipse_depth_error"],
                                                                      float)
        mean = np.sum(w * d)
        assert row["eclipse_depth"] == pytest.approx(mean, rel=1e-9, abs=1e-12)
        assert row["eclipse_depth_error"] == pytest.approx(
            np.sqrt(np.sum(w * (e ** 2 + (d - mean) ** 2))), rel=1e-9)
        assert row["best_model"] == rows["model"][np.argmax(w)]

    page = result.page.read_text(encoding="utf-8")
    assert "Grid of systematics models" in page and all(m in page for m in JOINT_MODELS)
    for link in re.findall(r'href="([^"]+index\.html)"', page):
        assert (result.page.parent / link).is_file()
    assert page.count("index.html") == 2 and "Consistency" in page

    white = planet[planet["channel"] == -1][0]
    head = fits.getheader(out / "visit-eclipse" / "truth.fits", "CHANNELS")
    for col, key in (("eclipse_depth", "WECLIPSE"), ("night_flux", "WNIGHT")):
        pull = (white[col] - head[key]) / white[f"{col}_error"]
        assert abs(pull) < 3, (col, white[col], head[key], white[f"{col}_error"])

    det = Table.read(folder / "detrended-1.fits", hdu="DETRENDED")
    truth = Table.read(out / "visit-eclipse" / "truth.fits", hdu="EXPOSURES")
    used = np.asarray(det["used"], bool)
    d = np.asarray(det["white_detrended"])[used]
    a = np.asarray(truth["white_astro"])[used]
    noise = np.sqrt(np.mean(np.asarray(det["white_detrended_error"])[used] ** 2))
    assert np.corrcoef(d, a)[0, 1] > 0.9
    assert np.sqrt(np.mean((d - a) ** 2)) < 4 * noise
    assert abs(np.mean(d - a)) < 3 * noise


def test_single_phase_curve_visit(phase_single):
    # A visit of kind phase-curve reduced alone runs the detrend stage's full-orbit fit on
    # the products the programme made (Luigi ran only Detrend), with the same products.
    result = phase_single
    assert result.ran == ["Detrend"]
    assert Path(result.final).name == "planet.fits"
    planet = Table.read(result.final, hdu="PLANET")
    assert len(planet) == len(EDGES)        # the white band and four channels
    assert np.isnan(np.ma.filled(planet["transit_depth_error"][0], np.nan))   # no transit in it
    assert (Path(result.final).parent / "detrended.fits").is_file()
    # The planet is marginalised over the phase-curve grid (Wakeford et al. 2016: weights
    # exp(-BIC/2) normalised, a channel's times the white band's weight as the models'
    # prior, Bayes' theorem; the weighted mean, the error adding the spread between
    # models): check PLANET against its own GRID table.
    grid = Table.read(result.final, hdu="GRID")
    models = set(grid["model"])
    assert len(models) == fits.getheader(result.final)["NMODELS"] >= 2
    assert len(grid) == len(models) * len(planet)
    white = {int(r["model_index"]): float(r["weight"]) for r in grid[grid["channel"] == -1]}
    for row in planet:
        rows = grid[grid["channel"] == row["channel"]]
        w = np.asarray(rows["weight"], float)
        assert abs(w.sum() - 1) < 1e-9
        bic = np.asarray(rows["bic"], float)
        prior = np.array([1.0 if row["channel"] == -1 else white[int(m)]
                          for m in rows["model_index"]])
        expect = prior * np.exp(-0.5 * (bic - bic.min()))
        np.testing.assert_allclose(w, expect / expect.sum(), rtol=1e-9, atol=1e-12)
        d, e = np.asarray(rows["eclipse_depth"], float), np.asarray(rows["eclipse_depth_error"], float)
        mean = np.sum(w * d)
        assert row["eclipse_depth"] == pytest.approx(mean, rel=1e-9, abs=1e-12)
        assert row["eclipse_depth_error"] == pytest.approx(
            np.sqrt(np.sum(w * (e ** 2 + (d - mean) ** 2))), rel=1e-9)
        assert row["best_model"] == rows["model"][np.argmax(w)]


def test_programme_errors_are_one_line(pair, capsys):
    # A user's mistake: one line per problem naming the file and what is wrong, exit
    # status 2 (the project's rule for bad input).
    from lightledger.tasks.cli import main

    out, programme, _ = pair
    bad = out / "bad-programme.toml"
    text = programme.read_text()
    bad.write_text(text.replace('"visit-eclipse/visit.toml"', f'"{out}/no-such/visit.toml"'))
    assert main(["reduce", str(bad)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "programme.visits names" in err[0] and str(bad) in err[0]
    bad.write_text(text.replace("eccentricity =", "eccentricty ="))
    assert main(["reduce", str(bad)]) == 2
    err = capsys.readouterr().err.strip()
    assert "planet.eccentricty" in err and "did you mean" in err


def test_tweak_of_one_visit_reruns_its_later_stages_and_the_joint_fit(pair):
    # Luigi's record of the tasks it ran: after a change to one visit's extraction, that
    # visit's extraction (reference, chunks, join), its binning and the joint fit run,
    # and nothing of the other visit or of either calibration.
    from lightledger.tasks.programme import reduce_programme

    out, programme, _ = pair
    visit = out / "visit-transit" / "visit.toml"
    text = visit.read_text()
    visit.write_text(text.replace("[stages.extract]\n", "[stages.extract]\nclip_threshold = 4.5\n"))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            result = reduce_programme(programme, settings=PROGRAMME_SETTINGS, workers=1)
        assert result.ok, "\n".join(result.messages)
        ran = result.ran_tasks
        assert {f for f, _ in ran} == {"ExtractReference", "ExtractChunk", "Extract", "Bin",
                                        "JointDetrend"}
        assert all(v == str(visit.resolve()) for f, v in ran if f != "JointDetrend")
        assert [v for f, v in ran if f == "JointDetrend"] == [str(programme.resolve())]
        again = reduce_programme(programme, settings=PROGRAMME_SETTINGS, workers=1)
        assert again.ok and again.ran_tasks == []
    finally:
        visit.write_text(text)
    shutil.rmtree(out / "visit-transit" / "notebook" / ".failures", ignore_errors=True)


def _joint_folders(notebook):
    return sorted(p for p in Path(notebook).iterdir() if p.is_dir() and p.name.startswith("joint-"))


def test_joint_stage_is_a_notebook_stage_forced_audited_compared_pruned(pair):
    # The joint fit as a notebook stage (the project's own notebook rules, README "The lab
    # notebook"): its entry records what audit recomputes its identity from, a made-record
    # beside it, products as readable as the visits' (umask applies); `--force joint`
    # re-makes only the joint fit, moves the old folder aside and gives byte-identical
    # products (SHA-256 of every output, figures included: deterministic bytes); audit,
    # compare, notebook list/prune/page then work on the programme's notebook.
    import json
    import os
    import time

    from lightledger.tasks.audit import audit
    from lightledger.tasks.base import read_made_record
    from lightledger.tasks.cli import main
    from lightledger.tasks.compare import compare
    from lightledger.tasks.notebook import list_entries, prune
    from lightledger.tasks.programme import JointDetrend, reduce_programme

    out, programme, result = pair
    notebook = out / "notebook"
    folder = Path(result.final).parent
    entry = json.loads((folder / "entry.json").read_text())
    assert entry["identity_hash"].startswith(folder.name.split("-")[1])
    assert entry["upstream"].count(":") == 1 and entry["facts"][0] == ["programme", entry["visit"]]
    made = read_made_record(folder / "entry.json")
    assert made["task"] == "JointDetrend" and len(made["sha256"]) == 64
    own = (out / "visit-eclipse" / "notebook").glob("bin-*/lightcurves.fits")
    assert os.stat(result.final).st_mode & 0o777 == os.stat(next(own)).st_mode & 0o777
    assert audit(notebook).problems == [] and audit(programme).problems == []

    # forcing: what Luigi is asked (cheap, no run) ...
    task = JointDetrend(programme=str(programme), settings=_settings_text(),
                        chains=_chains(programme), force_from="bin", force_after=time.time() + 1)
    assert task.folder == folder and not task.complete()
    assert {b.force_from for b in task.requires()} == {"bin"}     # a visit stage forces the fit
    joint_only = JointDetrend(programme=str(programme), settings=_settings_text(),
                              chains=_chains(programme), force_from="joint",
                              force_after=time.time() + 1)
    assert {b.force_from for b in joint_only.requires()} == {""} and not joint_only.complete()

    # ... and a forced run
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        forced = reduce_programme(programme, settings=PROGRAMME_SETTINGS, workers=1, force=["joint"])
    assert forced.ok, "\n".join(forced.messages)
    assert forced.ran_tasks == [("JointDetrend", str(programme.resolve()))]
    old = [p for p in _joint_folders(notebook) if p.name.startswith(folder.name + ".superseded-")]
    assert len(old) == 1
    again = json.loads((folder / "entry.json").read_text())
    assert again["outputs"] == json.loads((old[0] / "entry.json").read_text())["outputs"]
    assert audit(notebook).problems == []
    lines = compare(old[0], folder)
    assert any(line.startswith("parameters: identical") for line in lines), lines
    assert any("planet (phase-curve fit)" in line for line in lines)
    assert any(line.startswith("lineage A:") and ": bin" not in line for line in lines)
    rows = {r.folder: r for r in list_entries(notebook)[1]}
    assert (rows[folder.name].state, rows[folder.name].in_chain) == ("current", True)
    assert rows[old[0].name].state == "superseded" and not rows[old[0].name].in_chain
    assert main(["notebook", "page", str(programme)]) == 0
    assert (notebook / "index.html").is_file()
    assert main(["audit", str(programme)]) == 0

    # prune: the superseded joint entry goes; nothing of the visits' notebooks is touched
    reasons = {}
    _, would, _ = prune(notebook, dry_run=True, reasons=reasons)
    assert old[0].name in would and folder.name not in would and old[0].is_dir()
    assert reasons[old[0].name] == "superseded"
    # (an earlier test's tweaked joint entry, if any, is older and unreferenced: it goes too)
    assert all(n.startswith("joint-") for n in would)
    _, removed, _ = prune(programme)
    assert removed == would and not old[0].exists() and folder.is_dir()
    for visit in ("visit-eclipse", "visit-transit"):
        assert prune(out / visit / "notebook", dry_run=True)[1] == []
    assert audit(notebook).problems == []


def _settings_text():
    from lightledger.tasks.base import settings_to_text
    return settings_to_text(PROGRAMME_SETTINGS)


def _chains(programme):
    import json

    from lightledger.tasks.base import make_plan, settings_to_text, visit_config
    from lightledger.tasks.programme import load_programme

    text = settings_to_text(SETTINGS)
    prog = load_programme(programme, PROGRAMME_SETTINGS)
    return json.dumps([make_plan(visit_config(v, text), text).chain("bin") for v in prog.visits])


def test_joint_grid_members():
    # Which models the joint fit tries (the README's rule): the same model string for every
    # visit; by default the phase-curve grid of the visits' kind, a programme of scans and
    # stares pairing the k-th model of each; common-mode models (nothing divides a white
    # light out of a joint fit) are left out with a warning.
    from lightledger.pipeline.modelspec import DEFAULT_PHASE_SCAN_GRID, DEFAULT_PHASE_STARE_GRID
    from lightledger.pipeline.parameters import resolve
    from lightledger.tasks.programme import joint_members

    params = resolve("joint")
    members, warnings_ = joint_members(params, ["scan", "scan"])
    assert [m for m, _ in members] == list(DEFAULT_PHASE_SCAN_GRID) and warnings_ == []
    assert all(strings == [m, m] for m, strings in members)
    members, _ = joint_members(params, ["scan", "stare"])
    assert len(members) == min(len(DEFAULT_PHASE_SCAN_GRID), len(DEFAULT_PHASE_STARE_GRID))
    assert members[0][1] == [DEFAULT_PHASE_SCAN_GRID[0], DEFAULT_PHASE_STARE_GRID[0]]
    given = resolve("joint", {"models": ("visit1+ramp", "visit1+cm-sys")})
    members, warnings_ = joint_members(given, ["stare", "stare"])
    assert [m for m, _ in members] == ["visit1+ramp"] and "cm-sys" in warnings_[0]
