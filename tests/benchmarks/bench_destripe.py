"""Destriping of stares: how much of the white light's correlated read noise each estimate leaves.

Run on demand (pytest does not collect ``bench_*.py``)::

    python tests/benchmarks/bench_destripe.py [--seeds N] [--first S] [--exposures N]
                                              [--variants gap rows off] [--keep DIR]

For each seed the script renders ``stare-eclipse`` (150 exposures by default)
once with the forward model and reduces it with the default stage parameters
once per variant of the calibrate stage's destriping, each into its own
notebook beside the same raw files:

* ``gap``: the default, the readout-stream model whose smoothness is
  measured at the rows it bridges across the trace
  (``destripe(..., smoothing="gap")``);
* ``rows``: the same model with its smoothness measured between consecutive
  rows (calibrate version 5's default);
* ``off``: no destriping (``calibrate.destripe = "off"``).

Per variant it prints, as medians over seeds (each seed's figure in brackets):

* ``white before detrending``: the rms of the extracted white light over the
  truth's expected one (a parabola in time taken out) over the precision limit
  (truth ``white_sigma / white_flux``, which leaves the 1/f read noise out);
* ``white after detrending``: the grid's top model's residual rms per degree
  of freedom over the same limit (DEPTHS ``rms_dof_ppm``), as
  ``bench_grid.py`` prints it;
* ``channels after detrending``: the same, median over channels;
* ``white / channel depth error``: mean DEPTHS ``depth_error``, ppm (what a
  spectrum is quoted with);
* ``white pull``: (depth - injected) / error per seed.

A variant that lowers the white light's noise before detrending may still
leave more after it, where the trace width and background take out what a
pedestal under the trace does to the white light. Each reduction takes 10-30 s
on a 2-core machine; the default (10 seeds, three variants) about 15 minutes.

``--monte-carlo N`` instead draws N exposures of the forward model's read
noise alone (white read noise and its 1/f readout-stream and column noise,
``synthetic_data.detector.one_over_f_noise``) on the geometry of one rendered
stare (its source mask, aperture and optimal-extraction weights), destripes
their read differences with each estimator and prints the white light's noise
before detrending over the precision limit for each: none, ``rows``, ``gap``,
and ``oracle``, the best linear estimate (Gaussian-process prediction, e.g.
Rasmussen & Williams 2006, ch. 2) from every unlit pixel with the noise's
covariance known exactly and the frame's level free, which no estimate from
these pixels can beat on average.  The white light's error is the weighted
sum over the aperture of the noise left after a per-column level from the
rows away from the trace (as the background stage takes it out).  About
3 s per exposure for the oracle, 1.5 GB of memory.
"""

import argparse
import functools
import shutil
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

VARIANTS = {
    "gap": ({}, ()),
    "rows": ({"smoothing": None}, ()),
    "off": (None, ("calibrate.destripe=off",)),
}


def _white_before(visit_dir):
    """Rms of extracted white light / truth (parabola out) over the precision limit."""
    from astropy.io import fits
    from astropy.table import Table
    lc_path = sorted(visit_dir.glob("notebook/bin-*/lightcurves.fits"))[-1]
    lc = Table.read(lc_path, hdu="LIGHTCURVES")
    with fits.open(visit_dir / "truth.fits") as hdul:
        tr = hdul["EXPOSURES"].data
        flux, sigma = np.asarray(tr["white_flux"]), np.asarray(tr["white_sigma"])
    ok = ~np.asarray(lc["white_mask"], bool)
    r = np.asarray(lc["white_flux"])[ok] / flux[ok]
    r = r / np.median(r)
    t = np.asarray(lc["time_bjd_tdb"])[ok]
    t = (t - t.mean()) / np.ptp(t)
    a = np.vander(t, 3)
    res = r - a @ np.linalg.lstsq(a, r, rcond=None)[0]
    return float(res.std() / np.median(sigma / flux))


def reduce_variant(source, root, variant, seed):
    """Reduce the rendered visit ``source`` with one destriping variant; return its figures."""
    from astropy.table import Table

    import lightledger.tasks.calibrate as calibrate_task
    from lightledger.tasks.run import reduce_visit
    from bench_grid import _truth

    options, settings = VARIANTS[variant]
    folder = Path(root) / f"{variant}-{seed}"
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    for name in ("raw", "calibration", "instrument.toml", "truth.fits"):
        (folder / name).symlink_to((source / name).resolve())
    shutil.copy(source / "visit.toml", folder / "visit.toml")
    original = calibrate_task.calibrate_chunk
    if options:
        calibrate_task.calibrate_chunk = functools.partial(original, destripe_options=options)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            result = reduce_visit(folder / "visit.toml", settings=list(settings), workers=1)
    finally:
        calibrate_task.calibrate_chunk = original
    if not result.ok:
        raise SystemExit("\n".join(result.messages))
    depths = Table.read(result.final, hdu="DEPTHS")
    wdepth, cdepth, wlimit, climit = _truth(folder)
    white, chans = depths[0], depths[1:]
    return {
        "before": _white_before(folder),
        "white": float(white["rms_dof_ppm"]) * 1e-6 / wlimit,
        "channels": float(np.median(np.asarray(chans["rms_dof_ppm"]) * 1e-6 / climit)),
        "white_error": float(white["depth_error"]) * 1e6,
        "channel_error": float(np.mean(chans["depth_error"])) * 1e6,
        "white_pull": (float(white["depth"]) - wdepth) / float(white["depth_error"]),
    }


def _pink_correlation(length):
    """Autocorrelation of the forward model's 1/f series (power 1/f, no mean), circular."""
    f = np.fft.rfftfreq(length)
    p = np.zeros_like(f)
    p[1:] = 1.0 / f[1:]
    c = np.fft.irfft(p, n=length)
    return c / c[0]


def monte_carlo(root, seed, n_draws):
    """Noise-only Monte Carlo on one rendered stare's geometry; prints the white light's noise."""
    from astropy.io import fits

    from lightledger.pipeline.destripe import destripe
    from lightledger.pipeline.sourcemask import trace_source_mask
    from lightledger.synthetic_data import detector
    from lightledger.synthetic_data.scenarios import get_scenario
    from lightledger.tasks.run import reduce_visit

    sc = get_scenario("stare-eclipse")
    visit = render_stare(root, seed, 8)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        result = reduce_visit(visit, until="extract", workers=1)
    folder = Path(result.final).parent
    with fits.open(next(folder.parent.glob("calibrate-*/frames-000.fits"))) as hdul:
        flux = np.nan_to_num(hdul["FLUX"].data[0].astype(float))
        var = np.nan_to_num(hdul["VARIANCE"].data[0].astype(float), nan=1e12)
    with fits.open(folder / "reference.fits") as hdul:
        lo, hi = int(hdul[0].header["APLO"]), int(hdul[0].header["APHI"])
    with fits.open(Path(visit).parent / "truth.fits") as hdul:
        limit = float(np.median(hdul["EXPOSURES"].data["white_sigma"]))
    ny, nx = flux.shape
    mask = trace_source_mask(flux, row_pad=1, grow_sigma=2.0).mask
    prof = np.clip(flux, 0.0, None)
    prof[:lo] = 0.0
    prof[hi:] = 0.0
    colsum = prof.sum(axis=0)
    prof = prof / np.maximum(colsum, 1e-9)
    v = np.maximum(var, 1.0)
    weights = (prof / v) / np.maximum((prof ** 2 / v).sum(axis=0), 1e-30)   # Horne (1986)
    weights[:, colsum < 0.05 * colsum.max()] = 0.0
    away = np.ones(ny, bool)
    away[max(lo - 3, 0):hi + 3] = False

    def white(err):
        return float(((err - err[away].mean(axis=0)) * weights).sum())

    # the oracle: covariance of one read difference's correlated noise, known exactly
    n = ny * nx
    usable = np.flatnonzero(~mask.ravel())
    rho_s, rho_c = _pink_correlation(n), _pink_correlation(nx)
    col = np.arange(n) % nx

    def cov(i, j):
        return 2.0 * (sc.row_noise ** 2 * rho_s[(i[:, None] - j[None, :]) % n]
                      + sc.column_noise ** 2 * rho_c[(col[i][:, None] - col[j][None, :]) % nx])
    level = 1e4 * sc.row_noise ** 2            # a free level of the frame (a broad prior)
    k_uu = cov(usable, usable) + level + np.eye(usable.size) * 2.0 * sc.read_noise ** 2
    from scipy.linalg import cho_factor, cho_solve
    predictor = (cov(np.arange(n), usable) + level) @ cho_solve(cho_factor(k_uu), np.eye(usable.size))
    del k_uu

    rng = np.random.default_rng(seed)
    out = {k: [] for k in ("none", "rows", "gap", "oracle")}
    floor = []
    for i in range(n_draws):
        w = rng.normal(0.0, sc.read_noise, (sc.n_reads, ny, nx))
        c = detector.one_over_f_noise(rng, sc.n_reads, ny, nx, row_sigma=sc.row_noise,
                                      column_sigma=sc.column_noise)
        d = np.diff(w + c, axis=0)
        white_noise = np.diff(w, axis=0).sum(axis=0)
        floor.append(white(white_noise))
        out["none"].append(white(d.sum(axis=0)))
        out["rows"].append(white(destripe(d, mask, method="stream").frames.sum(axis=0)))
        out["gap"].append(white(destripe(d, mask, method="stream", smoothing="gap").frames.sum(axis=0)))
        pred = (predictor @ d.reshape(d.shape[0], -1)[:, usable].T).T.reshape(d.shape)
        out["oracle"].append(white((d - pred).sum(axis=0)))
    floor = np.array(floor)
    print(f"stare-eclipse geometry of seed {seed} ({int(mask.sum())} pixels masked, aperture rows "
          f"{lo}-{hi - 1}); {n_draws} draws of read noise; precision limit {limit:.0f} e-, "
          f"of which white read noise {floor.std():.0f} e-")
    for k, vals in out.items():
        excess = np.var(vals) - np.var(floor)
        print(f"  {k:8s} white light's noise before detrending / limit "
              f"{np.sqrt(1.0 + excess / limit ** 2):.3f}  (rms of the read noise's part {np.std(vals):.0f} e-)")


def render_stare(root, seed, n_exposures):
    """Render stare-eclipse into ``root/rendered-SEED``; return the visit description's path."""
    from lightledger.synthetic_data.render import render
    source = Path(root) / f"rendered-{seed}"
    if source.exists():
        shutil.rmtree(source)
    return render("stare-eclipse", source, seed=seed, n_exposures=n_exposures)


def summarise(variant, rows):
    def line(label, key, fmt):
        v = np.array([r[key] for r in rows])
        each = " ".join(format(x, fmt) for x in v)
        print(f"  {label:30s} {np.median(v):{fmt}}  [{each}]")
    print(f"{variant}: {len(rows)} seeds")
    line("white before detrending", "before", ".3f")
    line("white after detrending", "white", ".3f")
    line("channels after detrending", "channels", ".3f")
    line("white depth error (ppm)", "white_error", ".1f")
    line("channel depth error (ppm)", "channel_error", ".1f")
    pulls = np.array([r["white_pull"] for r in rows])
    print(f"  {'white pull':30s} scatter {pulls.std():.3f} (mean {pulls.mean():+.3f})  "
          f"[{' '.join(format(x, '+.2f') for x in pulls)}]")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--first", type=int, default=1, help="first seed")
    parser.add_argument("--exposures", type=int, default=150)
    parser.add_argument("--variants", nargs="+", default=list(VARIANTS), choices=list(VARIANTS))
    parser.add_argument("--keep", type=Path, default=None,
                        help="keep the rendered visits and their notebooks in this directory")
    parser.add_argument("--monte-carlo", type=int, default=0, metavar="N",
                        help="instead: N draws of read noise alone on the geometry of seed --first")
    args = parser.parse_args(argv)
    if args.monte_carlo:
        with tempfile.TemporaryDirectory(prefix="bench-destripe-") as tmp:
            monte_carlo(tmp if args.keep is None else args.keep, args.first, args.monte_carlo)
        return 0
    sys.path.insert(0, str(Path(__file__).parent))

    results = {v: [] for v in args.variants}
    with tempfile.TemporaryDirectory(prefix="bench-destripe-") as tmp:
        root = Path(tmp if args.keep is None else args.keep)
        root.mkdir(parents=True, exist_ok=True)
        for seed in range(args.first, args.first + args.seeds):
            source = Path(render_stare(root, seed, args.exposures)).parent
            for variant in args.variants:
                t0 = time.perf_counter()
                r = reduce_variant(source, root, variant, seed)
                results[variant].append(r)
                print(f"  seed {seed} {variant}: white before {r['before']:.3f}, after {r['white']:.3f}, "
                      f"channels {r['channels']:.3f}, errors {r['white_error']:.1f} / "
                      f"{r['channel_error']:.1f} ppm, white pull {r['white_pull']:+.2f} "
                      f"({time.perf_counter() - t0:.0f} s)", file=sys.stderr, flush=True)
    print(f"stare-eclipse: seeds {args.first}-{args.first + args.seeds - 1}, {args.exposures} exposures")
    for variant in args.variants:
        summarise(variant, results[variant])
    return 0


if __name__ == "__main__":
    sys.exit(main())
