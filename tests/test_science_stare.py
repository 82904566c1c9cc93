"""End to end on the stare-eclipse scenario: the reducer's products against the forward model's truth.

The visit (150 exposures of 100 s around the eclipse, seed 1) is rendered and
reduced once per session by the ``stare_visit`` fixture (tests/conftest.py);
``stare_destripe_off`` calibrates the same raw files again with
``calibrate.destripe=off``.  The truth is ``truth.fits`` (documented in
lightledger/synthetic_data/truth.py); the reducer never reads it.
"""

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline.mask import to_boolean
from lightledger.tasks.extract import N_REFERENCE

pytestmark = pytest.mark.slow

SCENARIO = "stare-eclipse"

# --------------------------------------------------------------------------
# eclipse depth
# --------------------------------------------------------------------------

def test_eclipse_depth_within_3_sigma(stare_visit, science):
    # Truth WDEPTH (truth.py): fp/fs times the phase-curve factor at
    # mid-eclipse, averaged over the white band by source electrons, i.e. the
    # planet flux that disappears, relative to the star.  The reducer's depth
    # is relative to the total out-of-eclipse flux (DEPTHS header DEPTHIS =
    # 'fp/(1+fp)'), so the truth is compared as W / (1 + W).  3 sigma from the
    # brief.
    _, channels, _ = science.read_truth(stare_visit.outdir)
    path = stare_visit.product("detrend", "detrended.fits")
    assert fits.getheader(path, "DEPTHS")["DEPTHIS"] == "fp/(1+fp)"
    row = Table.read(path, hdu="DEPTHS")[0]
    assert row["channel"] == -1
    w = channels.meta["WDEPTH"]
    truth = w / (1 + w)
    pull = (row["depth"] - truth) / row["depth_error"]
    assert np.isfinite(pull) and abs(pull) < 3.0, (
        f"eclipse depth {row['depth']:.6f} +- {row['depth_error']:.6f}, truth {truth:.6f}, "
        f"pull {pull:.2f}")


# --------------------------------------------------------------------------
# products
# --------------------------------------------------------------------------

def test_products_are_valid(stare_visit, stare_destripe_off, science):
    # Sources: see check_products in tests/conftest.py (FITS Standard 4.0,
    # checksum convention, fitsverify, astropy Table).  Covers the default
    # reduction and the calibrate stage run with destripe=off.
    problems = science.check_products(stare_visit.notebook)
    assert not problems, "\n".join(problems[:20])


# --------------------------------------------------------------------------
# extraction: drifts and wavelength zero point (the requirements of the scan)
# --------------------------------------------------------------------------

def _spectra_exposures(visit):
    with fits.open(visit.product("extract", "spectra.fits")) as hdul:
        return Table(hdul["EXPOSURES"].data)


@pytest.mark.parametrize("name", ["dx", "dy"])
def test_drifts_track_truth(stare_visit, science, name):
    # Only shifts relative to the reference (the median frame) are measurable
    # (common practice), so each series' mean is removed; 0.02 pixel rms as for
    # the scan (brief).  The correlation bound keeps the check from passing on
    # a constant series (the truth's own rms is 0.016 px in dx, 0.012 in dy).
    truth, _, _ = science.read_truth(stare_visit.outdir)
    measured = np.asarray(_spectra_exposures(stare_visit)[name], float)
    true = np.asarray(truth[name], float)
    a, b = measured - measured.mean(), true - true.mean()
    rms = float(np.sqrt(np.mean((a - b) ** 2)))
    corr = float(np.corrcoef(a, b)[0, 1])
    assert rms < 0.02 and corr > 0.9, f"{name}: rms of difference {rms:.4f} px, correlation {corr:.4f}"


def test_wavelength_zero_point(stare_visit, science):
    # As for the scan: the reference (median) frame's true drift is the median
    # truth dx of the exposures tasks/extract.py puts in it; the forward model
    # shifts the spectrum by +dx pixels (synthetic_data/model.py), the
    # convention of WAVESHFT (pipeline/wavelength.py).  0.1 pixel from the brief.
    truth, _, _ = science.read_truth(stare_visit.outdir)
    n = len(truth)
    pick = np.unique(np.linspace(0, n - 1, min(N_REFERENCE, n)).round().astype(int))
    true_shift = float(np.median(np.asarray(truth["dx"], float)[pick]))
    shift = fits.getheader(stare_visit.product("extract", "reference.fits"))["WAVESHFT"]
    assert abs(shift - true_shift) < 0.1, f"WAVESHFT {shift:.4f} px, truth {true_shift:.4f} px"


# --------------------------------------------------------------------------
# destriping
# --------------------------------------------------------------------------

def _rows_by_distance(reference_path, n_rows, n_columns, nearest, farthest=np.inf):
    """Rows whose distance from the fitted trace (reference.fits TRCOEFk about
    TRXREF) lies in (nearest, farthest] rows in every column."""
    h = fits.getheader(reference_path)
    coeffs = [h[f"TRCOEF{k}"] for k in range(10) if f"TRCOEF{k}" in h]
    x = np.arange(n_columns) - h["TRXREF"]
    trace = sum(c * x ** k for k, c in enumerate(coeffs))
    rows = np.arange(n_rows)
    distance = np.abs(rows[:, None] - trace[None, :])
    return rows[np.all((distance > nearest) & (distance <= farthest), axis=1)]


def _striping_power(folder, rows, rng):
    """Stripe power (e-^2) of the calibrated frames in ``rows``: the variance of
    per-row medians (over columns) and of per-column medians (over the rows),
    each minus the same variance after the frame's pixels are randomly
    permuted, which keeps the white noise and destroys the stripes (a Monte
    Carlo estimate of the white-noise floor).  Flagged pixels are left out.
    Mean over every exposure."""
    row_power, col_power, floor = [], [], []
    paths = sorted(folder.glob("frames-*.fits"))
    assert paths, f"{folder}: no calibrated frames"
    for path in paths:
        with fits.open(path) as hdul:
            flux = np.asarray(hdul["FLUX"].data, float)
            bad = to_boolean(hdul["FLAGS"].data) | ~np.isfinite(flux)
        d = np.where(bad, np.nan, flux)[:, rows, :]
        n, ny, nx = d.shape
        d = d - np.nanmedian(d.reshape(n, -1), axis=1)[:, None, None]
        shuffled = rng.permuted(d.reshape(n, -1), axis=1).reshape(d.shape)
        rv, rv0 = np.nanvar(np.nanmedian(d, axis=2), axis=1), np.nanvar(np.nanmedian(shuffled, axis=2), axis=1)
        cv, cv0 = np.nanvar(np.nanmedian(d, axis=1), axis=1), np.nanvar(np.nanmedian(shuffled, axis=1), axis=1)
        row_power.append(rv - rv0)
        col_power.append(cv - cv0)
        floor.append(np.stack([rv0, cv0], axis=1))
    return (float(np.mean(np.concatenate(row_power))), float(np.mean(np.concatenate(col_power))),
            np.mean(np.concatenate(floor), axis=0))


@pytest.mark.parametrize("where", ["far", "near"])
def test_destriping_lowers_striping_tenfold(stare_visit, stare_destripe_off, where):
    # Requirement (issue): with destriping, the striping power of calibrated
    # staring frames is at least 10x lower than without.  Striping: per-row
    # and per-column medians of rows away from the trace (common practice for
    # 1/f read noise, REFERENCES.md), above the white-noise floor; the stripe
    # power is the sum of both directions.  'far': rows more than 10 rows (8
    # sigma of the 1.25-row trace) from the trace, the pixels the destriping
    # itself measures on (an in-sample check).  'near': rows 6-10 rows (5-8
    # sigma) from the trace, free of source light.  Both are rows the
    # readout-stream model of the destriping is fitted on, so this is an
    # in-sample check; the out-of-sample gain under the trace is checked by
    # Monte Carlo in tests/test_calibrate.py and tests/test_destripe.py.  The scenario has 5 e- row and 3 e-
    # column 1/f noise per read (synthetic_data/scenarios.py), so there are
    # stripes to remove.
    ref = stare_visit.product("extract", "reference.fits")
    on = stare_visit.stage_folder("calibrate")
    off = stare_destripe_off
    assert on != off
    with fits.open(next(on.glob("frames-*.fits"))) as hdul:
        _, ny, nx = hdul["FLUX"].shape
    rows = (_rows_by_distance(ref, ny, nx, 10.0) if where == "far"
            else _rows_by_distance(ref, ny, nx, 6.0, 10.0))
    assert rows.size >= 5, f"only {rows.size} rows {where} from the trace"
    rng = np.random.default_rng(20240209)
    off_rows, off_cols, floor_off = _striping_power(off, rows, rng)
    on_rows, on_cols, floor_on = _striping_power(on, rows, rng)
    message = (f"stripe power e-^2, rows: off {off_rows:.2f} on {on_rows:.2f}; columns: off "
               f"{off_cols:.2f} on {on_cols:.2f}; white floors (rows, columns) off {np.round(floor_off, 2)} "
               f"on {np.round(floor_on, 2)}; rows used {rows.tolist()}")
    assert off_rows + off_cols > 1.0, "no stripes without destriping: " + message
    assert on_rows + on_cols <= (off_rows + off_cols) / 10, message


@pytest.mark.slow
def test_box_extraction_scatter_is_within_ten_percent_of_optimal(stare_visit, stare_box):
    # As for the scan (tests/test_science_scan.py): the profile-patched box sum
    # stays within 10 % of the optimal extraction's white rms (issue tolerance);
    # on a stare the box adds the read noise of the trace's empty wing rows.
    from lightledger.tasks.detrend import read_depths

    optimal = read_depths(stare_visit.product("detrend", "detrended.fits"))
    box = read_depths(stare_box / "detrended.fits")
    ratio = float(box["rms_ppm"][0] / optimal["rms_ppm"][0])
    print(f"white rms: box {box['rms_ppm'][0]:.1f} ppm, optimal {optimal['rms_ppm'][0]:.1f} ppm, "
          f"ratio {ratio:.3f}")
    assert ratio < 1.1
    assert float(np.median(box["rms_ppm"][1:] / optimal["rms_ppm"][1:])) < 1.1
