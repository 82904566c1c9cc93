"""Shared end-to-end fixtures: each demo scenario rendered and reduced once per session.

The fixtures render a fictional scenario with the forward model
(:func:`lightledger.synthetic_data.render.render`) into a session temporary
directory and reduce it with :func:`lightledger.tasks.run.reduce_visit`.  The
reducer never reads ``truth.fits``; the tests compare its products with it.
Rendering and reducing both scenarios takes about 25 s on 2 cores.
"""

import contextlib
import shutil
import subprocess
import warnings
from pathlib import Path
from types import SimpleNamespace
from typing import NamedTuple

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.units import UnitsWarning


#: Exposures and seed of the scan visit (5 orbits of 12 exposures).
SCAN_EXPOSURES, SCAN_SEED = 60, 1
#: Exposures and seed of the stare visit (150 x 100 s, about 4.2 h around the eclipse).
STARE_EXPOSURES, STARE_SEED = 150, 1


class ReducedVisit(NamedTuple):
    """A rendered and reduced visit.

    Attributes
    ----------
    outdir : Path
        Rendered visit directory (raw/, calibration/, truth.fits, notebook/).
    visit : Path
        Its visit.toml.
    result : RunResult
        What :func:`reduce_visit` returned.
    """

    outdir: Path
    visit: Path
    result: object        # lightledger.tasks.run.RunResult

    @property
    def notebook(self):
        return self.outdir / "notebook"

    def stage_folder(self, stage):
        """Folder of ``stage`` in the default reduction: the final product's folder and
        the folders it was made from (entry.json ``made_from``), so that later runs
        with other settings can add folders beside them."""
        import json

        folder = Path(self.result.final).parent.resolve()
        while True:
            entry = json.loads((folder / "entry.json").read_text())
            if entry["stage"] == stage:
                return folder
            assert entry["made_from"] != "raw", f"{stage}: not in the default reduction"
            folder = self.notebook.resolve() / entry["made_from"]

    def product(self, stage, name):
        """Path of the product ``name`` of ``stage`` in the default reduction."""
        path = self.stage_folder(stage) / name
        assert path.exists(), f"{path} missing"
        return path


def _reduce(tmp_path_factory, scenario, n_exposures, seed):
    # imported here so that a broken reducer fails these fixtures, not the collection
    # of every other test module
    from lightledger.synthetic_data.render import render
    from lightledger.tasks.run import reduce_visit

    outdir = tmp_path_factory.mktemp(scenario)
    visit = render(scenario, outdir, seed=seed, n_exposures=n_exposures)
    with warnings.catch_warnings():
        # a reduction of either scenario raises no RuntimeWarning (all-NaN slices,
        # divisions by zero...): the run fails if one does
        warnings.simplefilter("error", RuntimeWarning)
        result = reduce_visit(visit, workers=1)
    assert result.ok, "\n".join(result.messages)
    return ReducedVisit(outdir=Path(outdir), visit=Path(visit), result=result)


@pytest.fixture(scope="session")
def scan_visit(tmp_path_factory):
    """The scan-transit scenario, 60 exposures, seed 1, reduced with the defaults."""
    return _reduce(tmp_path_factory, "scan-transit", SCAN_EXPOSURES, SCAN_SEED)


@pytest.fixture(scope="session")
def stare_visit(tmp_path_factory):
    """The stare-eclipse scenario, 150 exposures, seed 1, reduced with the defaults."""
    return _reduce(tmp_path_factory, "stare-eclipse", STARE_EXPOSURES, STARE_SEED)


#: The phase-pair programme's small render (3 orbits of 9 exposures per visit) and its
#: settings: four channels and a joint grid of two models keep the suite short (the
#: default sizes and grid are the benchmark's, tests/benchmarks/bench_phase.py).
PHASE_EDGES = (1.31, 1.45, 1.6, 1.78, 1.99)
PHASE_SETTINGS = [("bin", "edges", PHASE_EDGES)]
PHASE_JOINT_MODELS = ("visit1+orbit2+scan+ramp", "visit1+orbit1+scan+ramp")


@pytest.fixture(scope="session")
def phase_programme(tmp_path_factory):
    """The phase-pair programme (two visits) rendered, reduced and fitted jointly.

    A namespace: ``out`` (rendered directory), ``programme`` (its TOML),
    ``result`` (what reduce_programme returned), ``settings`` (the visits'),
    ``programme_settings``, ``joint_models``, ``edges``.
    """
    from lightledger.synthetic_data.render import render
    from lightledger.tasks.programme import reduce_programme

    out = tmp_path_factory.mktemp("phase-pair")
    programme = render("phase-pair", out, seed=2, n_orbits=3, n_exposures=3 * 9)
    settings = list(PHASE_SETTINGS)
    programme_settings = settings + [("joint", "models", PHASE_JOINT_MODELS)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        result = reduce_programme(programme, settings=programme_settings, workers=1)
    assert result.ok, "\n".join(result.messages)
    return SimpleNamespace(out=Path(out), programme=Path(programme), result=result,
                           settings=settings, programme_settings=programme_settings,
                           joint_models=PHASE_JOINT_MODELS, edges=list(PHASE_EDGES))


@pytest.fixture(scope="session")
def phase_single(phase_programme):
    """The programme's eclipse visit (a phase-curve visit) reduced alone: its detrend stage.

    Only Detrend runs (the programme made the visit's earlier stages).
    """
    from lightledger.tasks.run import reduce_visit

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        result = reduce_visit(phase_programme.out / "visit-eclipse" / "visit.toml",
                              settings=phase_programme.settings)
    assert result.ok, "\n".join(result.messages)
    return result


def _reduce_again(visit, settings, until=None):
    """Reduce a rendered visit again with other settings (RuntimeWarning as an error)."""
    from lightledger.tasks.run import reduce_visit

    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        result = reduce_visit(visit.visit, settings=settings, until=until, workers=1)
    assert result.ok, "\n".join(result.messages)
    return result


@pytest.fixture(scope="session")
def scan_box(scan_visit):
    """Detrend folder of the scan visit reduced again with extract.method=box."""
    return Path(_reduce_again(scan_visit, [("extract", "method", "box")]).final).parent.resolve()


@pytest.fixture(scope="session")
def stare_box(stare_visit):
    """Detrend folder of the stare visit reduced again with extract.method=box."""
    return Path(_reduce_again(stare_visit, [("extract", "method", "box")]).final).parent.resolve()


@pytest.fixture(scope="session")
def rebin():
    """``rebin(visit, settings)``: the bin folder of a reduced visit binned again."""
    return lambda visit, settings: Path(_reduce_again(visit, settings, until="bin").final).parent


@pytest.fixture(scope="session")
def stare_destripe_off(stare_visit):
    """Calibrate folder of the stare visit calibrated again with calibrate.destripe=off."""
    from lightledger.tasks.run import reduce_visit

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        result = reduce_visit(stare_visit.visit, settings=[("calibrate", "destripe", "off")],
                              until="calibrate", workers=1)
    assert result.ok, "\n".join(result.messages)
    return Path(result.final).parent.resolve()


@pytest.fixture(scope="session")
def raw_scan(tmp_path_factory):
    """A rendered, unreduced scan visit: 10 exposures (one per file), seed 5; do not modify."""
    from lightledger.synthetic_data.render import render

    return render("scan-transit", tmp_path_factory.mktemp("raw-scan"), seed=5, n_exposures=10)


@pytest.fixture(scope="session")
def raw_stare(tmp_path_factory):
    """A rendered, unreduced stare visit: 60 exposures in two 4-D files, seed 5; do not modify."""
    from lightledger.synthetic_data.render import render

    return render("stare-eclipse", tmp_path_factory.mktemp("raw-stare"), seed=5, n_exposures=60)


# --------------------------------------------------------------------------
# helpers shared by the science tests (plain functions exposed as fixtures)
# --------------------------------------------------------------------------

def read_truth(outdir):
    """EXPOSURES table, CHANNELS table and primary header of truth.fits."""
    path = Path(outdir) / "truth.fits"
    with warnings.catch_warnings():
        warnings.simplefilter("error", UnitsWarning)    # the truth uses FITS-standard units too
        exposures = Table.read(path, hdu="EXPOSURES")
        channels = Table.read(path, hdu="CHANNELS")
    header = fits.getheader(path, 0)
    channels.meta["WDEPTH"] = fits.getheader(path, "CHANNELS")["WDEPTH"]
    return exposures, channels, header


def check_products(notebook):
    """Problems found in every FITS and ECSV product under ``notebook``; [] if none.

    Checks (sources):
    - astropy's ``HDUList.verify('exception')`` (FITS Standard 4.0 as astropy
      implements it);
    - CHECKSUM and DATASUM of every HDU present and correct (the FITS checksum
      convention, Seaman et al.; astropy's verify_checksum/verify_datasum);
    - Debian's ``fitsverify -q -e`` returns 0 (an independent checker), where
      installed;
    - every binary table reads back with ``astropy.table.Table.read`` alone,
      without a UnitsWarning (units the FITS standard knows), and every ECSV
      file reads back with ``Table.read(format='ascii.ecsv')``.
    """
    notebook = Path(notebook)
    problems = []
    fits_files = sorted(notebook.rglob("*.fits"))
    ecsv_files = sorted(notebook.rglob("*.ecsv"))
    if not fits_files or not ecsv_files:
        return [f"{notebook}: no FITS ({len(fits_files)}) or ECSV ({len(ecsv_files)}) products"]
    fitsverify = shutil.which("fitsverify")
    for path in fits_files:
        name = path.relative_to(notebook)
        try:
            with fits.open(path, checksum=True) as hdul:
                hdul.verify("exception")
                tables = []
                for k, hdu in enumerate(hdul):
                    if "CHECKSUM" not in hdu.header or "DATASUM" not in hdu.header:
                        problems.append(f"{name}[{k}]: no CHECKSUM/DATASUM")
                    elif hdu.verify_checksum() != 1 or hdu.verify_datasum() != 1:
                        problems.append(f"{name}[{k}]: checksum mismatch")
                    if isinstance(hdu, fits.BinTableHDU):
                        tables.append(k)
        except Exception as exc:          # verify('exception') raises VerifyError
            problems.append(f"{name}: {type(exc).__name__}: {exc}")
            continue
        for k in tables:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", UnitsWarning)
                table = Table.read(path, hdu=k)
            units = [str(w.message) for w in caught if issubclass(w.category, UnitsWarning)]
            if units:
                problems.append(f"{name}[{k}]: {units[0]}")
            if len(table.colnames) == 0:
                problems.append(f"{name}[{k}]: empty table")
        if fitsverify:
            run = subprocess.run([fitsverify, "-q", "-e", str(path)], capture_output=True, text=True)
            if run.returncode != 0:
                problems.append(f"{name}: fitsverify: {(run.stdout + run.stderr).strip()[:300]}")
    for path in ecsv_files:
        try:
            table = Table.read(path, format="ascii.ecsv")
        except Exception as exc:
            problems.append(f"{path.relative_to(notebook)}: {type(exc).__name__}: {exc}")
            continue
        if len(table) == 0 or not table.colnames:
            problems.append(f"{path.relative_to(notebook)}: empty table")
    return problems


def channel_flux_pulls(outdir, spectra_path, scenario):
    """Aligned spectra summed into the truth's channels, as pulls against the truth.

    The forward model puts on column X the light of nominal column X - dx
    (synthetic_data/model.py docstring), and the reducer aligns every exposure
    onto its reference (the median frame), whose own drift dx_ref it cannot
    know: only relative shifts are measurable (common practice).  Pixel i of
    the aligned spectra therefore holds the light of nominal column
    origin_x + i - dx_ref, with dx_ref = mean(truth dx - measured dx).  Each
    pixel enters a channel by the fraction of its wavelength interval inside
    the channel, as in the truth's definition (synthetic_data/truth.py).  The
    truth is counted before the flat field and the reducer divides by it, so
    both are in collected electrons.  Channel-exposures with a masked pixel
    are left out.

    Returns
    -------
    pulls : ndarray (n_exposures, n_channels)
        (reducer - truth) / reducer's sigma; NaN where left out.
    ratio : ndarray (n_exposures, n_channels)
        reducer / truth.
    dx_ref : float
        Pixels.
    """
    from lightledger.synthetic_data import model as vm
    from lightledger.synthetic_data.scenarios import get_scenario

    sc = get_scenario(scenario)
    truth, channels, _ = read_truth(outdir)
    with fits.open(spectra_path) as hdul:
        flux = np.asarray(hdul["FLUX"].data, float)
        var = np.asarray(hdul["VARIANCE"].data, float)
        mask = np.asarray(hdul["MASK"].data) > 0
        exposures = Table(hdul["EXPOSURES"].data)
    dx_ref = float(np.mean(np.asarray(truth["dx"]) - np.asarray(exposures["dx"])))
    columns = int(exposures["origin_x"][0]) + np.arange(flux.shape[1], dtype=float)
    lo = vm.wavelength_of_column(sc, columns - 0.5 - dx_ref)
    hi = vm.wavelength_of_column(sc, columns + 0.5 - dx_ref)
    weights = np.stack([np.clip(np.minimum(hi, b) - np.maximum(lo, a), 0.0, None) / (hi - lo)
                        for a, b in zip(channels["wave_min"], channels["wave_max"])])
    hit = (mask.astype(float) @ (weights.T > 0)) > 0
    good = ~mask & np.isfinite(flux) & np.isfinite(var)
    f = np.where(good, flux, 0.0) @ weights.T
    v = np.where(good, var, 0.0) @ (weights ** 2).T
    true_flux = np.asarray(truth["channel_flux"], float)
    pulls = np.where(hit, np.nan, (f - true_flux) / np.sqrt(v))
    return pulls, np.where(hit, np.nan, f / true_flux), dx_ref


@pytest.fixture(scope="session")
def science():
    """The helpers above, for the test modules (which cannot import conftest)."""
    return SimpleNamespace(read_truth=read_truth, check_products=check_products,
                           channel_flux_pulls=channel_flux_pulls)


@pytest.fixture(scope="module")
def quick_figures():
    """Stand-in stage figures (a blank 1 x 1 inch PNG) for tests whose subject is not the figures.

    Drawing the four diagnostic figures is most of the time of reducing a tiny
    visit; the bookkeeping tests reduce many times and look only at files,
    names and bytes (a stand-in is as deterministic as the real figures).
    The figures themselves are checked by tests/test_figures.py on the
    session's reductions.
    """
    with _blank_figures():
        yield


@pytest.fixture(scope="session")
def blank_figures():
    """``with blank_figures(): ...``: the stand-in figures of :func:`quick_figures` for one block."""
    return _blank_figures


#: The model grid of visits reduced by tests whose subject is not the grid (the notebook's
#: bookkeeping, validation, scheduling): two models, so ranking and marginalising still run.
#: The default scan grid is ~90 % of reducing a 12-exposure visit (16 s of 20 s with stand-in
#: figures; 2 s with these two); the session's scan_visit and stare_visit, the science
#: tests and tests/test_grid.py keep the default grids.
SHORT_SCAN_GRID = ("visit1+scan+ramp", "visit1+orbit1+scan+ramp")


def _short_grid(visit_toml, models=SHORT_SCAN_GRID):
    """Give a rendered visit description a short detrend grid (in its [stages.detrend])."""
    path = Path(visit_toml)
    text = path.read_text(encoding="utf-8")
    assert text.count("[stages.detrend]\n") == 1, f"{path}: no [stages.detrend] table"
    listed = ", ".join(f'"{m}"' for m in models)
    path.write_text(text.replace("[stages.detrend]\n", f"[stages.detrend]\nmodels = [{listed}]\n"),
                    encoding="utf-8")
    return path


@pytest.fixture(scope="session")
def short_grid():
    """``short_grid(visit_toml, models=SHORT_SCAN_GRID)``: a rendered visit's short model grid."""
    return _short_grid


@contextlib.contextmanager
def _blank_figures():
    from lightledger.tasks import figures
    from lightledger.tasks.products import save_figure

    def blank(path, *args, **kwargs):
        import matplotlib.pyplot as plt

        return save_figure(plt.figure(figsize=(1, 1)), path, dpi=20)

    with pytest.MonkeyPatch.context() as patch:
        for name in dir(figures):
            if name.endswith("_figure") and callable(getattr(figures, name)):
                patch.setattr(figures, name, blank)
        if hasattr(figures, "overlay_png"):       # the page's comparison of entries
            patch.setattr(figures, "overlay_png", lambda *args, **kwargs: None)
        yield
