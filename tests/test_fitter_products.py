"""A fitter with the detrend stage's products alone: metadata, column descriptions, coefficients.

Uses the shared reduced visits (tests/conftest.py ``scan_visit``,
``stare_visit``); nothing here reads the visit description.  The checks:

- every column of every table (FITS and ECSV) has a description, and the
  header / ECSV metadata state the target, ephemeris, geometry, limb
  darkening, exposure duration, channels and time scale the truth was
  rendered with (truth.fits; FITS Standard 4.0 for the time-column keywords);
- COEFFICIENTS is the covariance of the fit: its depth and mid-time entries
  equal the errors the product reports elsewhere (DEPTHS, GRID), and it is a
  covariance matrix (symmetric, positive semi-definite: a fact of linear
  algebra);
- a transit fit of the detrended ECSV light curves with batman (Kreidberg
  2015; Mandel & Agol 2002 quadratic limb darkening), at the ephemeris,
  geometry, limb darkening and exposure duration read from the products'
  metadata, recovers the injected depths of the channels it finds by the
  wavelengths in the metadata.
"""

import batman
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from scipy.optimize import least_squares

pytestmark = pytest.mark.slow

TABLES = ("DETRENDED", "DEPTHS", "GRID", "COEFFICIENTS")
ECSV = ("detrended.ecsv", "depths.ecsv", "grid.ecsv", "coefficients.ecsv")


@pytest.mark.parametrize("which", ["scan_visit", "stare_visit"])
def test_detrend_tables_carry_what_a_fitter_needs(which, request, science):
    visit = request.getfixturevalue(which)
    _, channels, truth = science.read_truth(visit.outdir)
    path = visit.product("detrend", "detrended.fits")
    with fits.open(path) as hdul:
        for name in TABLES:
            h = hdul[name].header
            described = {h[f"TTYPE{k}"]: h.get(f"TCOMM{k}") for k in range(1, h["TFIELDS"] + 1)}
            assert all(described.values()), (name, [k for k, v in described.items() if not v])
            for key, tkey in (("EPHT0", "T0"), ("EPHPER", "PERIOD"), ("GEORPRS", "RP_RS"),
                              ("GEOARS", "A_RS"), ("GEOINCL", "INCL"), ("LDU1", "U1"),
                              ("LDU2", "U2"), ("XPOSURE", "XPOSURE")):
                assert h[key] == pytest.approx(truth[tkey], abs=1e-9), (name, key)
            assert h["EVENT"] == truth["KIND"] and h["NCHAN"] == len(channels)
            assert h["OBJECT"] and np.isfinite(h["OBJRA"]) and np.isfinite(h["OBJDEC"])
            assert "T0FIT" in h and "fitted" in h.comments["T0FIT"]
        det = hdul["DETRENDED"].header
        n = [det[f"TTYPE{k}"] for k in range(1, det["TFIELDS"] + 1)].index("time_bjd_tdb") + 1
        assert det[f"TCTYP{n}"] == "TDB" and det[f"TRPOS{n}"] == "BARYCENTER"
        assert det[f"TUNIT{n}"] == "d"
    for name in ECSV:
        table = Table.read(path.parent / name, format="ascii.ecsv")
        assert all(table[c].description for c in table.colnames), (
            name, [c for c in table.colnames if not table[c].description])
        meta = table.meta
        assert meta["event"]["t0_bjd_tdb"] == pytest.approx(truth["T0"], abs=1e-9)
        assert meta["exposure_time_s"] == pytest.approx(truth["XPOSURE"])
        assert meta["limb_darkening"]["u1"] == pytest.approx(truth["U1"])
        edges = [(c["wave_lo_um"], c["wave_hi_um"]) for c in meta["channels"]]
        np.testing.assert_allclose(edges, np.c_[channels["wave_min"], channels["wave_max"]],
                                   atol=1e-9)
        assert meta["time_columns"]["time_bjd_tdb"]["scale"] == "tdb"
        assert meta["fitted_event"]["t0"]["fitted"]
    depths = Table.read(path.parent / "depths.ecsv", format="ascii.ecsv")
    assert depths["wave_mid"].unit == "um" and depths["tau_min"].unit == "min"
    np.testing.assert_allclose(depths["ld_u1"], truth["U1"])   # limb_darkening = visit
    # dim channels are flagged as in the light curves' CHANNELS
    lc_channels = Table.read(visit.product("bin", "lightcurves.fits"), hdu="CHANNELS")
    assert list(depths["dim"]) == [False] + list(lc_channels["dim"])
    wide = Table.read(path.parent / "detrended.ecsv", format="ascii.ecsv")
    lo, hi = float(channels["wave_min"][3]), float(channels["wave_max"][3])
    assert f"{lo:.4f}-{hi:.4f} um" in wide["detrended_03"].description


@pytest.mark.parametrize("which", ["scan_visit", "stare_visit"])
def test_coefficients_are_the_fits_covariance(which, request):
    visit = request.getfixturevalue(which)
    path = visit.product("detrend", "detrended.fits")
    coefs = Table.read(path, hdu="COEFFICIENTS")
    depths = Table.read(path, hdu="DEPTHS")
    grid = Table.read(path, hdu="GRID")
    header = fits.getheader(path, "COEFFICIENTS")
    assert list(coefs["channel"]) == list(depths["channel"])
    for row, d in zip(coefs, depths):
        n = int(row["n_terms"])
        names = row["names"].split(",")
        assert len(names) == n and names[0] == "constant" and "depth" in names
        values = np.asarray(row["values"], float)
        cov = np.asarray(row["covariance"], float)
        assert np.all(np.isfinite(values[:n])) and np.all(np.isnan(values[n:]))
        c = cov[:n, :n]
        np.testing.assert_allclose(c, c.T, rtol=1e-10, atol=0)
        scale = np.sqrt(np.outer(np.diag(c), np.diag(c)))
        unit = np.divide(c, scale, out=np.zeros_like(c), where=scale > 0)
        assert np.linalg.eigvalsh(unit).min() > -1e-8            # positive semi-definite
        k = names.index("depth")
        # the depth and its error are those of the top model in DEPTHS
        assert row["model"] == d["best_model"] or d["channel"] == -1
        assert values[k] == pytest.approx(float(d["depth_best"]), rel=1e-9)
        # (a channel's error_covariance adds what it inherits from the white fit)
        assert np.hypot(np.sqrt(c[k, k]), float(d["error_inherited"])) == pytest.approx(
            float(d["error_covariance"]), rel=1e-6)
        assert values[0] > 0                                     # the flux level, electrons
    # the white light's free mid-time: its value and error as in the header and GRID
    white = coefs[coefs["channel"] == -1][0]
    names = white["names"].split(",")
    k = names.index("event.t0")
    assert white["values"][k] == pytest.approx(header["T0FIT"], abs=1e-9)
    err = float(np.sqrt(white["covariance"][k, k]))
    assert err == pytest.approx(header["T0ERR"], rel=1e-6)
    top = grid[(grid["channel"] == -1) & (grid["rank"] == 1)][0]
    assert err == pytest.approx(float(top["t0_error"]), rel=1e-6)


def _transit(time, event, rp, u, exposure_days):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc = event["t0"], event["period"], rp, event["a_rs"], event["inc"]
    p.ecc, p.w, p.limb_dark, p.u = 0.0, 90.0, "quadratic", list(u)
    return batman.TransitModel(p, time, supersample_factor=5, exp_time=exposure_days), p


def test_fitter_recovers_depths_from_the_detrended_products_alone(scan_visit, science):
    # batman (Kreidberg 2015) transit times a constant, fitted with scipy least_squares
    # to the detrended light curves of detrended.ecsv; ephemeris, the white fit's
    # mid-time and geometry, limb darkening (depths.ecsv ld_u1, ld_u2), exposure
    # duration and channel wavelengths all from the products.  Truth: truth.fits
    # WDEPTH and CHANNELS.depth, matched by wavelength; pulls with the product's own
    # depth error (common practice).
    folder = scan_visit.stage_folder("detrend")
    det = Table.read(folder / "detrended.ecsv", format="ascii.ecsv")
    depths = Table.read(folder / "depths.ecsv", format="ascii.ecsv")
    meta = det.meta
    fitted = meta["fitted_event"]
    event = {"t0": fitted["t0"]["value"], "period": meta["event"]["period_d"],
             "a_rs": fitted["a_rs"]["value"], "inc": fitted["inclination"]["value"]}
    exposure = meta["exposure_time_s"] / 86400.0
    t = np.asarray(det["time_bjd_tdb"], float)
    used = np.asarray(det["used"], bool)
    _, truth_channels, _ = science.read_truth(scan_visit.outdir)

    def truth_of(channel):
        if channel < 0:
            return truth_channels.meta["WDEPTH"]
        c = meta["channels"][channel]
        hit = ((np.abs(truth_channels["wave_min"] - c["wave_lo_um"]) < 1e-6)
               & (np.abs(truth_channels["wave_max"] - c["wave_hi_um"]) < 1e-6))
        assert hit.sum() == 1, c
        return float(truth_channels["depth"][hit][0])

    pulls, agree = [], []
    for row in depths:
        j = int(row["channel"])
        y = np.asarray(det["white_detrended" if j < 0 else f"detrended_{j:02d}"], float)
        e = np.asarray(det["white_detrended_error" if j < 0 else f"detrended_error_{j:02d}"], float)
        ok = used & np.isfinite(y) & np.isfinite(e)
        model, params = _transit(t[ok], event, np.sqrt(max(row["depth"], 1e-4)),
                                 (row["ld_u1"], row["ld_u2"]), exposure)

        def residual(x):
            params.rp = x[1]
            return (y[ok] - x[0] * model.light_curve(params)) / e[ok]

        fit = least_squares(residual, [1.0, params.rp], x_scale="jac")
        depth = fit.x[1] ** 2
        pulls.append((depth - truth_of(j)) / float(row["depth_error"]))
        agree.append((depth - float(row["depth_best"])) / float(row["depth_error"]))
    pulls, agree = np.array(pulls), np.array(agree)
    print("pulls against the truth:", np.round(pulls, 2))
    print("against the product's top model:", np.round(agree, 2))
    # each within 3.5 sigma, and together consistent with the injected spectrum
    # (chi-square p above 0.01, one degree of freedom per light curve)
    from scipy.stats import chi2 as chi2_dist
    assert np.all(np.abs(pulls) < 3.5), np.round(pulls, 2)
    assert chi2_dist.sf(np.sum(pulls ** 2), pulls.size) > 0.01, np.round(pulls, 2)
    # the same detrended data at the same event: the depth the product reports
    assert np.all(np.abs(agree) < 0.5), np.round(agree, 2)
