"""Tests of the forward model (lightledger.synthetic_data).

Each check names its source: Monte Carlo with a stated tolerance, conservation
of charge, the raw layout's own conventions, astropy's FITS verification.
"""

import dataclasses
import tomllib
import warnings

import numpy as np
import pytest
from astropy.io import fits
from astropy.time import Time, TimeDelta

from lightledger.pipeline.errors import ParameterError
from lightledger.synthetic_data import detector, model as vm, scene
from lightledger.synthetic_data.render import SCENARIOS, render, simulate_reads
from lightledger.synthetic_data.scenarios import get_scenario


@pytest.fixture(scope="module")
def scan_model():
    return vm.build_visit(get_scenario("scan-transit"), seed=5, n_exposures=10)


@pytest.fixture(scope="module")
def stare_dirs(tmp_path_factory):
    out = tmp_path_factory.mktemp("stare")
    calls = []
    visit = render("stare-eclipse", out / "a", seed=2, n_exposures=60,
                   progress=lambda done, total: calls.append((done, total)))
    assert calls[0] == (1, 60) and calls[-1] == (60, 60) and len(calls) == 60
    return visit


@pytest.fixture(scope="module")
def scan_dirs(tmp_path_factory):
    out = tmp_path_factory.mktemp("scan")
    a = render("scan-transit", out / "a", seed=3, n_exposures=10)
    b = render("scan-transit", out / "b", seed=3, n_exposures=10)
    c = render("scan-transit", out / "c", seed=4, n_exposures=10)
    return a.parent, b.parent, c.parent


@pytest.mark.parametrize("rate", [0.0, 50.0, 400.0])
def test_read_difference_variance(rate):
    # Common practice: for a staring pixel without cosmic rays the difference of two
    # consecutive reads has variance 2 s^2 + rate dt (read noise of both reads plus the
    # Poisson variance of the charge collected in between), in electrons.
    # Monte Carlo: 64 x 64 pixels x 5 differences = 20480 samples, so the sample
    # variance has a relative standard error of about sqrt(2 / 20480) = 1 %;
    # tolerance 5 %.
    rng = np.random.default_rng(11)
    shape, dt, s, gain = (64, 64), 10.0, 14.0, 2.0
    times = np.arange(6) * dt
    expected = times[:, None, None] * np.full((1,) + shape, rate)
    reads = simulate_reads(expected, rng=rng, bias=np.full(shape, 1000.0),
                           nonlinearity=np.zeros((2,) + shape), gain=gain, read_noise=s,
                           full_well=1e9)
    diffs = np.diff(reads.astype(float), axis=0) * gain
    want = 2 * s ** 2 + rate * dt
    assert np.var(diffs) == pytest.approx(want, rel=0.05)
    assert np.mean(diffs) == pytest.approx(rate * dt, abs=5 * np.sqrt(want / diffs.size))


def test_correlated_noise_is_striped():
    # The 1/f streams make row and column stripes: the variance of row means of a read
    # far exceeds the white-noise value sigma^2 / n_columns (Monte Carlo, factor 10).
    rng = np.random.default_rng(3)
    noise = detector.one_over_f_noise(rng, 20, 40, 256, row_sigma=5.0, column_sigma=3.0)
    assert noise.std() == pytest.approx(np.hypot(5.0, 3.0), rel=0.1)
    row_means = noise.mean(axis=2)
    assert row_means.var() > 10 * 25.0 / 256
    col_means = noise.mean(axis=1)
    assert col_means.var() > 10 * 34.0 / 40
    # different from read to read
    assert np.corrcoef(noise[0].ravel(), noise[1].ravel())[0, 1] < 0.2


def _slow_scan(spectrum, c0, v, sigma, n_rows, times, n_steps=4000):
    """Reference: midpoint rule in time of the pixel-integrated Gaussian (slow, obvious)."""
    out = np.zeros((times.size, n_rows, spectrum.size))
    for k, t in enumerate(times):
        if t == 0:
            continue
        dt = t / n_steps
        for m in range(n_steps):
            c = c0 + v * (m + 0.5) * dt
            out[k] += scene.row_fraction(c, sigma, n_rows) * spectrum[None, :] * dt
    return out


def test_scan_kernel_matches_time_integration():
    # The analytic erf-antiderivative kernel against a direct numerical time integral
    # (midpoint rule, 4000 steps: relative error ~1e-7); tolerance 1e-5 of the peak.
    spectrum = np.array([100.0, 250.0, 40.0])
    c0 = np.array([5.2, 5.3, 5.35])
    times = np.array([0.0, 3.0, 7.5, 12.0])
    for v in (1.3, -0.9):
        start = c0 if v > 0 else c0 + 12
        fast = scene.scan_charge(spectrum, start, v, 1.1, 30, times)
        slow = _slow_scan(spectrum, start, v, 1.1, 30, times)
        assert np.max(np.abs(fast - slow)) < 1e-5 * slow.max()


def test_scan_conserves_flux(scan_model):
    # Conservation: summed over rows, the scanned exposure holds exactly the staring
    # rate times the time (no flat, noise-free), for forward and reverse scans, at
    # every read.
    for i in (0, 1):                         # forward, reverse
        scanned = vm.source_charge(scan_model, i, with_flat=False)
        staring = vm.source_charge(scan_model, i, velocity=0.0, with_flat=False)
        np.testing.assert_allclose(scanned.sum(axis=1), staring.sum(axis=1), rtol=1e-9, atol=1e-6)
        rate = staring[1].sum(axis=0) / scan_model.read_times[1]
        np.testing.assert_allclose(scanned[-1].sum(axis=0), rate * scan_model.exposure_time,
                                   rtol=1e-9, atol=1e-6)


def test_truth_white_flux_is_rendered_charge(scan_model):
    # Conservation between the truth table and the rendered charge: with the drift
    # set to zero, the band-weighted sum of the noise-free source charge at the last
    # read (flat not applied) equals the truth's white_flux and channel_flux.
    from lightledger.synthetic_data.truth import truth_columns
    still = dataclasses.replace(scan_model, dx=np.zeros(10), dy=np.zeros(10))
    tr = truth_columns(still)
    for i in range(3):
        per_column = vm.source_charge(still, i, with_flat=False)[-1].sum(axis=0)
        assert per_column @ tr["weights_white"] == pytest.approx(tr["white_flux"][i], rel=1e-9)
        np.testing.assert_allclose(tr["weights_channels"] @ per_column, tr["channel_flux"][i],
                                   rtol=1e-9)


def test_trap_ramps_render_the_trapping_model():
    # The charge-trapping option (Zhou et al. 2017, AJ 153, 243): every column's
    # rendered charge is its exponential-free charge times the recorded fraction
    # of the published trap equations (lightledger.pipeline.traps, tested against
    # a hand computation there) at the column's rate per pixel, and the truth
    # counts exactly what is rendered (conservation, as above).  Fainter columns
    # fill their traps more slowly and lose a larger fraction: the ramp differs
    # per channel, so that no achromatic exponential describes it.
    from lightledger.pipeline.traps import TrapPopulation, trap_history
    from lightledger.synthetic_data.truth import truth_columns
    sc = get_scenario("scan-transit")
    n = 24
    traps = vm.build_visit(sc, seed=5, n_exposures=n, ramps="traps")
    plain = vm.build_visit(sc, seed=5, n_exposures=n)
    assert np.all(traps.systematics["ramp_orbit"] == 1.0)
    no_ramp = plain.systematics["systematics"] / plain.systematics["ramp_orbit"]
    np.testing.assert_allclose(traps.systematics["systematics"], no_ramp, rtol=1e-12)
    incident = (vm.source_rate(sc, traps.columns)[None, :]
                * vm.astrophysical_signal(sc, traps.t0, traps.bjd_tdb, traps.wave) * no_ramp[:, None])
    pops = [TrapPopulation(*p) for p in sc.trap_populations]
    ref = trap_history(incident / sc.scan_length, traps.start, traps.exposure_time, pops,
                       initial=sc.trap_initial, refill=sc.trap_refill, orbit=traps.orbit)
    np.testing.assert_allclose(traps.trap_fraction, ref.recorded_fraction, rtol=1e-12)
    for i in (0, 7):
        a = vm.source_charge(traps, i, with_flat=False)[-1].sum(axis=0)
        b = vm.source_charge(plain, i, with_flat=False)[-1].sum(axis=0) / plain.systematics["ramp_orbit"][i]
        np.testing.assert_allclose(a, b * traps.trap_fraction[i], rtol=1e-9)
    loss = 1 - traps.trap_fraction[0]
    lit = vm.source_rate(sc, traps.columns) > 0.2 * vm.source_rate(sc, traps.columns).max()
    rate = vm.source_rate(sc, traps.columns)[lit]
    assert loss[lit][np.argmin(rate)] > 1.2 * loss[lit][np.argmax(rate)]
    still = dataclasses.replace(traps, dx=np.zeros(n), dy=np.zeros(n))
    tr = truth_columns(still)
    per_column = vm.source_charge(still, 3, with_flat=False)[-1].sum(axis=0)
    assert per_column @ tr["weights_white"] == pytest.approx(tr["white_flux"][3], rel=1e-9)
    assert 0.98 < tr["ramp_traps"][0] < tr["ramp_traps"][5] < 1.0
    with pytest.raises(ParameterError, match="no trap populations"):
        vm.build_visit(get_scenario("stare-eclipse"), n_exposures=10, ramps="traps")


def test_nonlinearity_round_trip():
    # The layout's convention linear = e (1 + sum C[k-1] e^k): applying the numerical
    # inverse and then the forward polynomial returns the input to 1e-6 relative.
    sc = get_scenario("scan-transit")
    rng = np.random.default_rng(0)
    refs = detector.make_reference_files(
        rng, full_shape=(16, 24), bias_level=0, dark_rate=0.1, flat_kind="2d",
        nonlin_c1=sc.nonlin_c1, nonlin_c2=sc.nonlin_c2, n_dead=0, n_hot=0,
        hot_rate_range=(1, 2))
    linear = np.linspace(0, 9e4, 7)[:, None, None] * np.ones((16, 24))
    linear_copy = linear.copy()
    e = detector.apply_nonlinearity(linear, refs.nonlinearity)
    back = detector.linearize(e, refs.nonlinearity)
    np.testing.assert_allclose(back, linear, rtol=1e-6, atol=1e-9)
    np.testing.assert_array_equal(linear, linear_copy)
    # Common practice (from memory): a few per cent near full well.
    deficit = 1 - e[-2] / linear[-2]          # at 7.5e4 electrons
    assert np.all((deficit > 0.01) & (deficit < 0.06))


def _verify(path):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with fits.open(path, checksum=True) as hdul:
            hdul.verify("exception")
            return [h.header.copy() for h in hdul], {h.name: (None if h.data is None else h.data.copy())
                                                    for h in hdul}


def test_rendering_is_deterministic(scan_dirs):
    # Same seed -> same bytes apart from the CHECKSUM/DATASUM time stamps (astropy's
    # FITSDiff); a different seed -> different reads (the test can fail).
    a, b, c = scan_dirs
    names = sorted(p.relative_to(a) for p in a.rglob("*") if p.is_file())
    assert any(str(n).startswith("raw/") for n in names)
    for name in names:
        if name.suffix == ".fits":
            diff = fits.FITSDiff(str(a / name), str(b / name), ignore_keywords=["CHECKSUM"],
                                 ignore_comments=["CHECKSUM", "DATASUM"])
            assert diff.identical, diff.report()
        else:
            assert (a / name).read_bytes() == (b / name).read_bytes()
    raw = sorted((a / "raw").glob("*.fits"))[0]
    assert not fits.FITSDiff(str(raw), str(c / "raw" / raw.name), ignore_keywords=["CHECKSUM"]).identical


def test_scan_files_follow_layout(scan_dirs):
    # Raw layout version 1: 3-D READS (n_reads, ny, nx), READTIME (n_reads,) from 0,
    # no STARTOFF for one exposure per file; SCANVEL alternates in sign; OBSGEO radius
    # of a 550 km orbit; files pass astropy's verify with valid checksums.
    a = scan_dirs[0]
    files = sorted((a / "raw").glob("*.fits"))
    assert len(files) == 10
    sc = get_scenario("scan-transit")
    signs, begs = [], []
    for f in files:
        headers, data = _verify(f)
        h = headers[0]
        assert data["READS"].shape == (sc.n_reads,) + sc.sub_shape
        assert data["READTIME"].shape == (sc.n_reads,) and data["READTIME"][0] == 0
        assert "STARTOFF" not in data
        assert h["TIMESYS"] == "UTC" and h["XPOSURE"] == data["READTIME"][-1]
        r = np.sqrt(h["OBSGEO-X"] ** 2 + h["OBSGEO-Y"] ** 2 + h["OBSGEO-Z"] ** 2)
        assert r == pytest.approx(6378137.0 + 550e3, rel=1e-6)
        signs.append(np.sign(h["SCANVEL"]))
        begs.append(Time(h["DATE-BEG"], scale="utc"))
    assert signs == [1, -1] * 5
    assert all((b2 - b1).sec > 0 for b1, b2 in zip(begs, begs[1:]))
    for name in ("bias", "dark", "flat", "nonlinearity", "bad_pixels", ):
        _, data = _verify(a / "calibration" / f"{name}.fits")
        assert data["PRIMARY"].shape[-2:] == sc.full_shape
    _, truth = _verify(a / "truth.fits")
    assert len(truth["EXPOSURES"]) == 10
    assert truth["EXPOSURES"]["channel_flux"].shape == (10, len(sc.channel_edges) - 1)


def test_stare_files_follow_layout(stare_dirs):
    # Raw layout version 1: 4-D READS (n_exp, n_reads, ny, nx) with STARTOFF (n_exp,),
    # SCANVEL 0, no OBSGEO; truth times agree with DATE-BEG + STARTOFF + XPOSURE/2.
    a = stare_dirs.parent
    sc = get_scenario("stare-eclipse")
    files = sorted((a / "raw").glob("*.fits"))
    assert len(files) == 2
    mids = []
    for f in files:
        headers, data = _verify(f)
        h = headers[0]
        n = data["READS"].shape[0]
        assert data["READS"].shape == (n, sc.n_reads) + sc.sub_shape
        assert data["STARTOFF"].shape == (n,) and data["STARTOFF"][0] == 0
        assert np.all(np.diff(data["STARTOFF"]) > h["XPOSURE"])
        assert h["SCANVEL"] == 0 and "OBSGEO-X" not in h
        t = Time(h["DATE-BEG"], scale="utc") + TimeDelta(data["STARTOFF"] + h["XPOSURE"] / 2,
                                                          format="sec")
        mids.append(t.mjd)
    _, truth = _verify(a / "truth.fits")
    np.testing.assert_allclose(np.concatenate(mids), truth["EXPOSURES"]["time_mjd_utc"],
                               rtol=0, atol=1e-9)   # 1e-9 d = 86 us
    visit = tomllib.loads((a / "visit.toml").read_text())
    profile = tomllib.loads((a / "instrument.toml").read_text())
    assert visit["event"]["kind"] == "eclipse"
    edges = visit["stages"]["bin"]["edges"]
    assert visit["stages"]["bin"]["white_range"] == [edges[0], edges[-1]]
    np.testing.assert_allclose(truth["CHANNELS"]["wave_min"], edges[:-1])
    assert profile["detector"]["full_shape"] == list(sc.full_shape)
    for rel in profile["reference_files"].values():
        assert (a / rel).is_file()


def test_unknown_scenario_names_valid_ones(tmp_path):
    with pytest.raises(ParameterError, match="scan-transit"):
        render("no-such-scenario", tmp_path)
    assert set(SCENARIOS) == {"scan-transit", "stare-eclipse", "phase-orbit", "phase-pair"}


@pytest.mark.parametrize("name", ["scan-transit", "stare-eclipse", "phase-orbit"])
def test_rendered_visit_description_uses_only_known_stage_keys(name, tmp_path):
    # The visit description a render writes must reduce as written: every [stages.X] key
    # is a parameter the stage declares (pipeline/parameters.py), and the validation pass
    # finds no unknown key in it (the profile and raw folder are not rendered here).
    from lightledger.pipeline.parameters import STAGES
    from lightledger.synthetic_data.render import _write_visit
    from lightledger.tasks.config import load_visit
    from lightledger.tasks.problems import Problems

    sc = get_scenario(name)
    model = vm.build_visit(sc, seed=1, n_exposures=2 * sc.n_orbits)
    path = tmp_path / "visit.toml"
    _write_visit(model, path, 1e-3)
    stages = tomllib.loads(path.read_text())["stages"]
    for stage, keys in stages.items():
        assert set(keys) <= {p.name for p in STAGES[stage].params}, (stage, keys)
    problems = Problems()
    load_visit(path, (), problems)
    assert not [p.line for p in problems.errors if "unknown key" in p.line]
