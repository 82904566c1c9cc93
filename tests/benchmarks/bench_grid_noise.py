"""The model grid's errors on a visit's noise-free light curves plus white noise: white and channel pulls.

Run on demand (pytest does not collect ``bench_*.py``)::

    python tests/benchmarks/bench_grid_noise.py [--visit DIR | --seed S] [--draws N]
                                                [--noise-seed K] [--noiseless]

A rendered visit's truth (``truth.fits``: the white and channel fluxes
before noise, every systematic included) is scaled to the extracted light
curves and given Gaussian noise of the light curves' stated errors: each
channel its own, the white light the sum of the channels' draws plus an
independent rest for the part of its variance the channels do not hold (the
white band is the sum of the channels).  The default grid then refits each
draw (:func:`lightledger.pipeline.grid.fit_grid` with the detrend stage's
parameters) and the script prints, over the draws,

* the marginalised white depth's pulls (scatter and mean) and the channels'
  (scatter, mean, the scatter about each draw's mean, i.e. the part the
  channels do not share, and the draw means' correlation with the white
  pull);
* per model: its white and channel depth pulls (scatter/mean), its mean
  weight, and the share of the channel errors inherited from the white fit.

Honest errors give scatters of 1 (common practice: a Monte Carlo over noise
draws of a known truth).  This tells the errors' honesty for white noise
from what a particular noise draw did to a bench seed.  ``--noiseless``
fits the truth without noise once: each model's bias in errors.

``--visit`` takes a visit kept by ``bench_grid.py --keep`` (its notebook
holds the binned light curves); without it a ``scan-transit`` visit with
exponential ramps is rendered and reduced first (about half a minute).
Each draw's grid takes 5-15 s on a 2-core machine.
"""

import argparse
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_grid import _truth  # noqa: E402


def _render(root, seed):
    from lightledger.synthetic_data.render import render
    from lightledger.tasks.run import reduce_visit
    outdir = Path(root) / f"scan-exponential-{seed}"
    visit = render("scan-transit", outdir, seed=seed, n_exposures=60)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        result = reduce_visit(visit, workers=1)
    if not result.ok:
        raise SystemExit("\n".join(result.messages))
    return outdir


def draws(vdir, n_draws, noise_seed, noiseless=False, models=None):
    """Fit the default grid to ``n_draws`` noisy copies of a visit's truth; yields per draw
    (white pull, channel pulls, per-model pulls, weights, inherited share, model names, seconds)."""
    from astropy.table import Table

    from lightledger.pipeline.grid import fit_grid
    from lightledger.pipeline.modelspec import parse_grid
    from lightledger.tasks.config import load_visit
    from lightledger.tasks.detrend import grid_setup
    from lightledger.tasks.lightcurves import read_lightcurves

    vdir = Path(vdir)
    visit = load_visit(vdir / "visit.toml")
    lc_path = sorted(vdir.glob("notebook/bin-*/lightcurves.fits"))
    if not lc_path:
        raise SystemExit(f"{vdir}: no notebook/bin-*/lightcurves.fits (keep a visit with bench_grid.py --keep)")
    lc0, channels = read_lightcurves(lc_path[-1])
    tr = Table.read(vdir / "truth.fits", hdu="EXPOSURES")
    wd, cd, _, _ = _truth(vdir)
    truth = np.concatenate([[wd], cd])
    f = np.asarray(lc0["white_flux"], float)
    e = np.asarray(lc0["white_error"], float)
    F = np.asarray(lc0["flux"], float)
    E = np.asarray(lc0["error"], float)
    tw = np.asarray(tr["white_flux"], float)
    tc = np.asarray(tr["channel_flux"], float)
    ok = np.isfinite(f) & np.all(np.isfinite(F), axis=1)
    sw = np.nanmedian(f[ok] / tw[ok])
    sc = np.nanmedian(F[ok] / tc[ok], axis=0)
    rest = np.sqrt(np.clip(e ** 2 - np.sum(E ** 2, axis=1), 0.0, None))
    params = dict(visit.stages["detrend"])
    if models:
        params["models"] = tuple(models)
    rng = np.random.default_rng(noise_seed)
    amp = 0.0 if noiseless else 1.0
    for _ in range(1 if noiseless else n_draws):
        noise = rng.standard_normal(F.shape) * E * amp
        lc = lc0.copy(copy_data=True)
        lc["flux"] = sc * tc + noise
        lc["white_flux"] = sw * tw + noise.sum(axis=1) + rest * rng.standard_normal(f.size) * amp
        specs, curves, options, _ = grid_setup(lc, channels, visit.event, params)
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            gf = fit_grid(parse_grid([s.name for s in specs]), curves, visit.event, **options)
        with np.errstate(divide="ignore", invalid="ignore"):
            yield ((gf.value[0] - truth[0]) / gf.value_error[0], (gf.value[1:] - truth[1:]) / gf.value_error[1:],
                   (gf.depth - truth) / gf.error, gf.weight, gf.error_inherited / gf.error,
                   [s.name for s in gf.specs], time.perf_counter() - t0)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--visit", type=Path, default=None, help="a visit kept by bench_grid.py --keep")
    parser.add_argument("--seed", type=int, default=5, help="seed of the visit to render without --visit")
    parser.add_argument("--draws", type=int, default=24)
    parser.add_argument("--noise-seed", type=int, default=7)
    parser.add_argument("--noiseless", action="store_true", help="fit the truth once, without noise")
    parser.add_argument("--models", nargs="+", default=None, help="a grid other than the default")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="bench-grid-noise-") as tmp:
        vdir = args.visit if args.visit is not None else _render(tmp, args.seed)
        rows = []
        for k, row in enumerate(draws(vdir, args.draws, args.noise_seed, args.noiseless, args.models)):
            rows.append(row)
            print(f"  draw {k}: white pull {row[0]:+.2f}, channel pulls mean {np.mean(row[1]):+.2f} "
                  f"std {np.std(row[1]):.2f} ({row[6]:.0f} s)", file=sys.stderr, flush=True)
    white = np.array([r[0] for r in rows])
    chans = np.array([r[1] for r in rows])
    means = chans.mean(axis=1)
    n_ch = chans.shape[1]
    within = np.std(chans - means[:, None]) * np.sqrt(n_ch / max(n_ch - 1, 1))
    print(f"\n{vdir.name}: {len(rows)} draw(s) of white noise on the truth "
          f"(noise seed {args.noise_seed}{', noiseless' if args.noiseless else ''})")
    print(f"  white pull scatter              {np.std(white):.3f}  (mean {np.mean(white):+.3f})")
    print(f"  channel pull scatter            {np.std(chans):.3f}  (mean {np.mean(chans):+.3f}, {chans.size} pulls)")
    if len(rows) > 2:
        print(f"  channel pulls about draw means  {within:.3f}  (draw means scatter {np.std(means):.3f}; "
              f"correlation with the white pull {np.corrcoef(means, white)[0, 1]:+.2f})")
    P = np.array([r[2] for r in rows])
    W = np.array([r[3] for r in rows])
    inh = np.array([r[4] for r in rows])
    print("  per model: white pull scatter/mean, weight | channel pull scatter/mean, weight, "
          "inherited share of the error")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for i, name in enumerate(rows[0][5]):
            print(f"    {name:44s} {np.nanstd(P[:, i, 0]):.2f}/{np.nanmean(P[:, i, 0]):+.2f} "
                  f"{np.mean(W[:, i, 0]):.2f} | {np.nanstd(P[:, i, 1:]):.2f}/{np.nanmean(P[:, i, 1:]):+.2f} "
                  f"{np.mean(W[:, i, 1:]):.2f} {np.nanmean(inh[:, i, 1:]):.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
