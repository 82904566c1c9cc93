"""A fitter with the phase-curve products alone: metadata, column descriptions, coefficients.

Uses the shared phase-pair programme (tests/conftest.py ``phase_programme``:
two visits fitted jointly) and its eclipse visit reduced alone
(``phase_single``); nothing here reads a visit or programme description.
The checks:

- every column of every table of every phase-curve product (FITS and ECSV)
  has a description, and the headers / ECSV metadata state the target,
  ephemeris, orbit, limb darkening and exposure duration the truth was
  rendered with (truth.fits), the FITS Standard 4.0 time-column keywords, and
  the white band's fitted planet as PLANET gives it;
- COEFFICIENTS is the fit's covariance: the day side c0 - a1 of the planet's
  coefficients (Cowan & Agol 2008) and its error sqrt(C00 + C11 - 2 C01)
  (linear algebra) are the top model's in GRID, and the matrix is symmetric
  positive semi-definite;
- PLANET's two sides of the amplitude's and the offset's intervals are GRID's models'
  sides marginalised as the errors are (Wakeford et al. 2016, computed here);
- every model of the grid keeps its detrended light curves (grid-models),
  the top model's equal to DETRENDED;
- exposures set aside at input keep their rows, flagged and NaN with their
  reason, in DETRENDED, the grid models and the PHASE tables.
"""

import json
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

pytestmark = pytest.mark.slow

KEYS = (("EPHT0", "T0"), ("EPHPER", "PERIOD"), ("GEORPRS", "RP_RS"), ("GEOARS", "A_RS"),
        ("GEOINCL", "INCL"), ("LDU1", "U1"), ("LDU2", "U2"))


def _folders(phase_programme, phase_single):
    return {"single": Path(phase_single.final).parent,
            "joint": Path(phase_programme.result.final).parent}


def _tables(path):
    with fits.open(path) as hdul:
        return [(h.name, h.header) for h in hdul[1:] if h.name != "PROVENANCE"]


@pytest.mark.parametrize("which", ["single", "joint"])
def test_phase_products_carry_what_a_fitter_needs(which, phase_programme, phase_single, science):
    folder = _folders(phase_programme, phase_single)[which]
    _, _, truth = science.read_truth(phase_programme.out / "visit-eclipse")
    edges = np.asarray(phase_programme.edges, float)        # the channels asked for
    planet = Table.read(folder / "planet.fits", hdu="PLANET")
    white = planet[planet["channel"] == -1][0]
    products = sorted(folder.glob("*.fits"))
    names = {p.name for p in products}
    stems = ({"detrended.fits", "grid-models.fits"} if which == "single" else
             {"detrended-1.fits", "detrended-2.fits", "grid-models-1.fits", "grid-models-2.fits"})
    assert stems | {"planet.fits"} <= names
    for path in products:
        for name, h in _tables(path):
            described = {h[f"TTYPE{k}"]: h.get(f"TCOMM{k}") for k in range(1, h["TFIELDS"] + 1)}
            assert all(described.values()), (path.name, name,
                                              [k for k, v in described.items() if not v])
            for key, tkey in KEYS:
                assert h[key] == pytest.approx(truth[tkey], abs=1e-9), (path.name, name, key)
            assert h["GEOECC"] == pytest.approx(truth.get("ECC", 0.0), abs=1e-12)
            assert h["XPOSURE"] == pytest.approx(truth["XPOSURE"], rel=1e-6)
            assert h["EVENT"] == "phase-curve" and h["NCHAN"] == edges.size - 1
            assert h["OBJECT"] and np.isfinite(h["OBJRA"]) and np.isfinite(h["OBJDEC"])
            assert "a priori" in h.comments["T0FIT"] and "EPHTEVT" not in h
            assert h["PLDAY"] == pytest.approx(white["eclipse_depth"], rel=1e-12)
            assert h["PLDAYE"] == pytest.approx(white["eclipse_depth_error"], rel=1e-12)
            assert h["PLAMPLO"] == pytest.approx(white["amplitude_error_lo"], rel=1e-12)
            assert h["NVISITS"] == (1 if which == "single" else 2)
            cols = [h[f"TTYPE{k}"] for k in range(1, h["TFIELDS"] + 1)]
            if "time_bjd_tdb" in cols:          # FITS Standard 4.0 time-column keywords
                n = cols.index("time_bjd_tdb") + 1
                assert h[f"TCTYP{n}"] == "TDB" and h[f"TRPOS{n}"] == "BARYCENTER"
                assert h[f"TUNIT{n}"] == "d"
    for path in sorted(folder.glob("*.ecsv")):
        table = Table.read(path, format="ascii.ecsv")
        assert all(table[c].description for c in table.colnames), (
            path.name, [c for c in table.colnames if not table[c].description])
        meta = table.meta
        assert meta["event"]["kind"] == "phase-curve"
        assert meta["event"]["t0_bjd_tdb"] == pytest.approx(truth["T0"], abs=1e-9)
        assert meta["geometry"]["a_rs"] == pytest.approx(truth["A_RS"], abs=1e-9)
        assert meta["limb_darkening"]["u1"] == pytest.approx(truth["U1"])
        assert meta["exposure_time_s"] == pytest.approx(truth["XPOSURE"], rel=1e-6)
        assert meta["time_columns"]["time_bjd_tdb"]["scale"] == "tdb"
        assert meta["target"]["name"] and meta["fitted_event"]["t0"]["fitted"] is False
        np.testing.assert_allclose([(c["wave_lo_um"], c["wave_hi_um"]) for c in meta["channels"]],
                                   np.c_[edges[:-1], edges[1:]], atol=1e-9)
        fp = meta["fitted_planet"]
        assert fp["eclipse_depth"]["value"] == pytest.approx(white["eclipse_depth"], rel=1e-12)
    wide = Table.read(folder / ("detrended.ecsv" if which == "single" else "detrended-1.ecsv"),
                      format="ascii.ecsv")
    assert f"{edges[2]:.4f}-{edges[3]:.4f} um" in wide["detrended_02"].description
    # the asymmetric sides: positive, and the symmetric error at most their root mean
    # square (per model it is their mean, and mean^2 <= mean square; the spread between
    # models adds alike to all three)
    for row in planet:
        for err, lo_, hi_ in (("amplitude_error", "amplitude_error_lo", "amplitude_error_hi"),
                              ("offset_error_deg", "offset_error_lo_deg", "offset_error_hi_deg")):
            e, a, b = float(row[err]), float(row[lo_]), float(row[hi_])
            assert a > 0 and b > 0
            assert 0 < e <= np.sqrt(0.5 * (a * a + b * b)) * (1 + 1e-9)
    entry = json.loads((folder / "entry.json").read_text())
    if which == "single":
        for key in ("white_free", "depth_errors", "phase_curve", "fit"):
            assert key in entry["not_applying"], entry["not_applying"]
    else:
        assert entry["not_applying"] == {}          # two models: the criterion weighs them


@pytest.mark.parametrize("which", ["single", "joint"])
def test_phase_coefficients_and_grid_models(which, phase_programme, phase_single):
    folder = _folders(phase_programme, phase_single)[which]
    path = folder / "planet.fits"
    coefs = Table.read(path, hdu="COEFFICIENTS")
    planet = Table.read(path, hdu="PLANET")
    grid = Table.read(path, hdu="GRID")
    assert list(coefs["channel"]) == list(planet["channel"])
    for row, p in zip(coefs, planet):
        n = int(row["n_terms"])
        names = row["names"].split(",")
        assert len(names) == n and names[0] == "1:constant"
        values = np.asarray(row["values"], float)
        c = np.asarray(row["covariance"], float)[:n, :n]
        assert np.all(np.isfinite(values[:n])) and np.all(np.isnan(values[n:]))
        np.testing.assert_allclose(c, c.T, rtol=1e-10, atol=0)
        scale = np.sqrt(np.outer(np.diag(c), np.diag(c)))
        unit = np.divide(c, scale, out=np.zeros_like(c), where=scale > 0)
        assert np.linalg.eigvalsh(unit).min() > -1e-8               # positive semi-definite
        assert row["model"] == p["best_model"]
        top = grid[(grid["channel"] == p["channel"]) & (grid["rank"] == 1)][0]
        k0, k1 = names.index("planet_c0"), names.index("planet_cos1")
        day = values[k0] - values[k1]                # F_p(pi) = c0 - a1 (one harmonic)
        day_error = np.sqrt(c[k0, k0] + c[k1, k1] - 2 * c[k0, k1])
        assert day == pytest.approx(float(top["eclipse_depth"]), rel=1e-9, abs=1e-15)
        assert day_error == pytest.approx(float(top["eclipse_depth_error"]), rel=1e-6)
        if "rp_rs" in names:
            k = names.index("rp_rs")
            assert np.sqrt(c[k, k]) == pytest.approx(float(top["rp_rs_error"]), rel=1e-6)
    # the two sides of the amplitude's and the offset's 68 % intervals: per model their mean
    # is the symmetric error, and PLANET's are marginalised over GRID's models as the
    # error is (Wakeford et al. 2016), each side with its own errors:
    # sqrt(sum W (side^2 + (x - sum W x)^2)), over the models that measured the quantity
    for p in planet:
        rows = grid[grid["channel"] == p["channel"]]
        for name, err, lo, hi in (
                ("amplitude", "amplitude_error", "amplitude_error_lo", "amplitude_error_hi"),
                ("offset_deg", "offset_error_deg", "offset_error_lo_deg", "offset_error_hi_deg")):
            x, e = (np.asarray(rows[k], float) for k in (name, err))
            a, b = (np.asarray(rows[k], float) for k in (lo, hi))
            ok = np.isfinite(x) & (np.asarray(rows["weight"], float) > 0)
            np.testing.assert_allclose(e[ok], 0.5 * (a[ok] + b[ok]), rtol=1e-9)
            if name == "offset_deg":                  # on the top model's branch
                ref = x[np.argmin(np.asarray(rows["rank"]))]
                x = ref + (x - ref + 180.0) % 360.0 - 180.0
            w = np.asarray(rows["weight"], float)[ok]
            w = w / w.sum()
            spread = (x[ok] - np.sum(w * x[ok])) ** 2
            assert p[lo] == pytest.approx(np.sqrt(np.sum(w * (a[ok] ** 2 + spread))), rel=1e-9)
            assert p[hi] == pytest.approx(np.sqrt(np.sum(w * (b[ok] ** 2 + spread))), rel=1e-9)
            assert p[err] == pytest.approx(np.sqrt(np.sum(w * (e[ok] ** 2 + spread))), rel=1e-9)
    # every model's detrended light curves beside the top model's
    n_models = fits.getheader(path)["NMODELS"]
    white_top = int(grid[(grid["channel"] == -1) & (grid["rank"] == 1)][0]["model_index"])
    for k, stem in enumerate(["detrended"] if which == "single"
                             else ["detrended-1", "detrended-2"]):
        det = Table.read(folder / f"{stem}.fits", hdu="DETRENDED")
        models = folder / stem.replace("detrended", "grid-models")
        with fits.open(models.with_suffix(".fits")) as hdul:
            tabs = [h for h in hdul if h.name.startswith("MODEL_")]
            assert len(tabs) == n_models
            assert {h.header["MODEL"] for h in tabs} == set(grid["model"])
            top = Table(tabs[white_top].data)
        np.testing.assert_array_equal(np.asarray(top["white_detrended"]),
                                      np.asarray(det["white_detrended"]))
        assert list(top["exposure"]) == list(det["exposure"])


def test_set_aside_exposures_keep_their_rows_in_the_phase_tables(phase_programme, tmp_path):
    # The eclipse visit's light curves with two exposures set aside (as the input check
    # marks an unreadable file: set_aside True, NaN fluxes, masks True, orbit -1, the
    # reason), fitted with one model and written by write_phase_products; the products
    # read back with astropy alone keep one row per exposure.
    from lightledger.pipeline.phasegrid import fit_phase_grid
    from lightledger.pipeline.programme import fit_programme
    from lightledger.tasks.base import settings_to_text, visit_config
    from lightledger.tasks.lightcurves import read_lightcurves
    from lightledger.tasks.phasecurve import planet_model, visit_curves, write_phase_products
    from lightledger.tasks.products import Provenance

    visit_dir = phase_programme.out / "visit-eclipse"
    visit = visit_config(visit_dir / "visit.toml", settings_to_text(phase_programme.settings))
    lc_path = sorted((visit_dir / "notebook").glob("bin-*/lightcurves.fits"))[0]
    lc, channels = read_lightcurves(lc_path)
    aside = [3, 16]
    lc["reason"] = np.array([str(r) for r in lc["reason"]], dtype="U64")
    for i in aside:
        lc["set_aside"][i] = True
        lc["reason"][i] = "not FITS"
        for name in ("white_flux", "white_error", "flux", "error"):
            lc[name][i] = np.nan
        lc["white_mask"][i] = True
        lc["mask"][i] = True
        lc["orbit"][i] = -1
    params = dict(visit.stages["detrend"], models=(phase_programme.joint_models[0],))
    planet = planet_model(visit.event, params)
    fit = fit_programme([visit_curves(lc, visit.event, params, visit.name)], planet)
    grid = fit_phase_grid([fit], [params["models"][0]])
    prov = Provenance("detrend", "test", "0000000000", params, {}, visit=visit.name)
    write_phase_products(tmp_path, prov, grid.top_fit(), [lc], channels,
                         (float(channels["wave_lo"][0]), float(channels["wave_hi"][-1])), planet,
                         params, names=[visit.name], grid=grid, target=visit.target,
                         event=visit.event, figures=False)
    n = len(lc)
    det = Table.read(tmp_path / "detrended.fits", hdu="DETRENDED")
    model = Table.read(tmp_path / "grid-models.fits", hdu="MODEL_00")
    for name, table in (("DETRENDED", det), ("MODEL_00", model),
                        ("PHASE_WHITE", Table.read(tmp_path / "planet.fits", hdu="PHASE_WHITE")),
                        ("PHASE_02", Table.read(tmp_path / "planet.fits", hdu="PHASE_02")),
                        ("ecsv", Table.read(tmp_path / "phasecurve-01.ecsv", format="ascii.ecsv"))):
        assert len(table) == n, name
        flagged = np.flatnonzero(np.asarray(table["set_aside"], bool))
        assert flagged.tolist() == aside, name
        assert all(str(r).startswith("set aside: not FITS") for r in table["reason"][aside])
        assert not np.any(np.asarray(table["used"], bool)[aside])
        value = "white_detrended" if "white_detrended" in table.colnames else "planet_flux"
        assert np.all(np.isnan(np.asarray(table[value], float)[aside]))
        assert np.isfinite(np.asarray(table[value], float)[4])
        assert list(table["exposure"]) == list(lc["exposure"]), name
        t = np.asarray(table["time_bjd_tdb"], float)
        np.testing.assert_allclose(t, np.asarray(lc["time_bjd_tdb"], float), rtol=0, atol=0)
        np.testing.assert_allclose(np.asarray(table["phase"], float)[aside],
                                   np.mod((t[aside] - visit.event["t0"])
                                          / visit.event["period"], 1.0), atol=1e-12)
    assert int(np.sum(det["used"])) == int(np.sum(~fit.white.visits[0].fit_mask))
