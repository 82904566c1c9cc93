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
    args = parser.parse_args(argv)
    sys.path.insert(0, str(Path(__file__).parent))
    from lightledger.synthetic_data.render import render

    results = {v: [] for v in args.variants}
    with tempfile.TemporaryDirectory(prefix="bench-destripe-") as tmp:
        root = Path(tmp if args.keep is None else args.keep)
        root.mkdir(parents=True, exist_ok=True)
        for seed in range(args.first, args.first + args.seeds):
            source = root / f"rendered-{seed}"
            if source.exists():
                shutil.rmtree(source)
            render("stare-eclipse", source, seed=seed, n_exposures=args.exposures)
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
