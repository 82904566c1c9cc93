"""The model grid on rendered visits: noise, honest errors, the injected ramps, the grid's cost.

Run on demand (pytest does not collect ``bench_*.py``)::

    python tests/benchmarks/bench_grid.py [--seeds N] [--first S] [--exposures N]
                                          [--scenarios scan-exponential scan-traps stare]
                                          [--save FILE.npz] [--pool FILE.npz ...]

For each scenario and seed the script renders a visit with the forward model
(``scan-transit`` with exponential ramps, ``scan-transit`` with
charge-trapping ramps, or ``stare-eclipse``), reduces it with the default
stage parameters (the default model grid) in this process, and compares the
products with the truth.  Per scenario it prints, over the seeds:

* ``white rms / limit`` and ``channel rms / limit``: the top model's residual
  rms per degree of freedom (DEPTHS ``rms_dof_ppm``) over the precision
  limit of an ideal optimal extraction of the rendered photons (truth
  ``white_sigma / white_flux``, ``channel_sigma / channel_flux``; the
  channel figure is the median over channels), median over seeds;
* ``spectrum p``: the chi-square p-value of the marginalised channel depths
  against the injected spectrum, per seed (one degree of freedom per
  channel);
* ``pull scatter``: the standard deviation of (depth - injected) / error of
  the marginalised channel depths, pooled over seeds and channels (honest
  errors give 1; with 10 channels and 8 seeds its own scatter would be about
  0.08 for independent channels, but the channels of a visit share the white
  light's error, so that one seed whose white light is off by 3 errors moves
  ten pulls together), and the same for the white depth; the channel pulls'
  scatter about each seed's mean (the part the channels do not share) and the
  seed means' scatter with its correlation with the white pull (the shared
  part); each scatter with its 68 and 95 per cent intervals from a bootstrap
  over seeds (whole seeds drawn with replacement, so that the offset the
  channels of a seed share is resampled with them, not treated as ten
  independent pulls; Efron & Tibshirani 1993, the cluster bootstrap);
* ``injected family weight``: the weight of the models holding the injected
  kind of ramp (a common-mode model counting with the white model it divides
  out), averaged over the white light and the channels;
* ``grid / single fit``: the processor time of the grid's fit of the light
  curves over that of one model's (``visit1+orbit2+scan+ramp`` for scans,
  ``visit1+ramp`` for stares; the fastest of three), measured side by side on
  the same light curves in this process.

Each reduction takes about half a minute on a 2-core machine; the default (8
seeds of the two scan scenarios) about 10 minutes.  Rendered visits go to a
temporary directory that is removed at the end.  ``--save`` keeps each seed's
pulls (one ``.npz`` per run, the scenario in its keys); ``--pool`` prints the
pooled figures of saved runs without reducing anything, so that seeds
reduced in separate runs of the same code are summarised together.
"""

import argparse
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

SCENARIOS = {
    "scan-exponential": ("scan-transit", "exponential", "exponential ramp", "visit1+orbit2+scan+ramp"),
    "scan-traps": ("scan-transit", "traps", "charge trapping", "visit1+orbit2+scan+ramp"),
    "stare": ("stare-eclipse", "exponential", "exponential ramp", "visit1+ramp"),
}


def _truth(outdir):
    from astropy.io import fits
    from astropy.table import Table
    with fits.open(outdir / "truth.fits") as hdul:
        exp = Table(hdul["EXPOSURES"].data)
        ch = Table(hdul["CHANNELS"].data)
        wdepth = float(hdul["CHANNELS"].header["WDEPTH"])
        kind = hdul[0].header["KIND"]
    if kind == "eclipse":           # the reducer's depth is fp / (1 + fp)
        to = lambda d: d / (1 + d)  # noqa: E731
    else:
        to = lambda d: d            # noqa: E731
    white_limit = float(np.median(exp["white_sigma"] / exp["white_flux"]))
    chan_limit = np.median(np.asarray(exp["channel_sigma"]) / np.asarray(exp["channel_flux"]), axis=0)
    return to(wdepth), to(np.asarray(ch["depth"], float)), white_limit, chan_limit


def _family_weight(grid_table, family):
    """Weight of the models holding ``family``, mean over light curves (GRID table)."""
    from lightledger.pipeline.modelspec import parse_model
    white = grid_table[grid_table["channel"] == -1]
    top_white = parse_model(white["model"][np.argmax(white["weight"])])
    totals = []
    for c in np.unique(grid_table["channel"]):
        rows = grid_table[grid_table["channel"] == c]
        w = 0.0
        for row in rows:
            spec = parse_model(row["model"])
            fams = set(spec.families)
            if spec.common_mode:
                fams |= top_white.families
            if family in fams:
                w += float(row["weight"])
        totals.append(w)
    return float(np.mean(totals))


def seed_bootstrap(groups, statistic=np.std, n_boot=4000, seed=0):
    """Percentile intervals of ``statistic`` of pooled values, resampling whole groups.

    ``groups`` holds one array per seed (its channel pulls); a bootstrap
    sample draws as many seeds with replacement and pools their values, so
    that the part a seed's values share stays with them (the cluster
    bootstrap; Efron & Tibshirani 1993, from memory).

    Returns
    -------
    (lo68, hi68, lo95, hi95)
    """
    rng = np.random.default_rng(seed)
    groups = [np.atleast_1d(np.asarray(g, float)) for g in groups]
    draws = rng.integers(0, len(groups), size=(n_boot, len(groups)))
    stats = np.array([statistic(np.concatenate([groups[i] for i in row])) for row in draws])
    return tuple(float(x) for x in np.percentile(stats, [16, 84, 2.5, 97.5]))


def _interval(groups, statistic=np.std):
    lo68, hi68, lo95, hi95 = seed_bootstrap(groups, statistic)
    return f"68% {lo68:.2f}-{hi68:.2f}, 95% {lo95:.2f}-{hi95:.2f}"


def summarise(label, rows, n_exp):
    """Print the pooled figures of one scenario's seeds (``rows`` from :func:`run_one`)."""
    pulls = np.concatenate([r["pulls"] for r in rows])
    white = np.array([r["white_pull"] for r in rows])
    seeds = " ".join(str(r.get("seed", "?")) for r in rows)
    print(f"\n{label}: {len(rows)} seeds of {n_exp} exposures (seeds {seeds})")
    print(f"  white rms / limit (per dof)     {np.median([r['white_rms'] for r in rows]):.3f}")
    print(f"  channel rms / limit (median)    {np.median([r['chan_rms'] for r in rows]):.3f}")
    print(f"  spectrum chi-square p per seed  "
          + " ".join(f"{r['p']:.3f}" for r in rows)
          + f"   (lowest {min(r['p'] for r in rows):.3f})")
    print(f"  channel pull scatter            {np.std(pulls):.3f}  "
          f"(mean {np.mean(pulls):+.3f}, {pulls.size} pulls; "
          f"{_interval([r['pulls'] for r in rows])} over seeds)")
    means = np.array([np.mean(r["pulls"]) for r in rows])
    within = [r["pulls"] - np.mean(r["pulls"]) for r in rows]
    n_ch = rows[0]["pulls"].size
    corr = np.sqrt(n_ch / max(n_ch - 1, 1))
    print(f"  channel pulls about seed means  {np.std(np.concatenate(within)) * corr:.3f}  "
          f"({_interval(within, lambda x: np.std(x) * corr)}; seed means scatter {np.std(means):.3f}, "
          f"correlation with the white pull {np.corrcoef(means, white)[0, 1]:+.2f})")
    print(f"  white pull scatter              {np.std(white):.3f}  (mean {np.mean(white):+.3f}; "
          f"{_interval(list(white))})")
    family = [r["family"] for r in rows]
    print(f"  injected family weight          {np.mean(family):.3f}  "
          f"(per seed {' '.join(f'{w:.2f}' for w in family)})")
    print(f"  grid / single fit time          {np.median([r['cost'] for r in rows]):.1f}  "
          f"(grid {np.median([r['t_grid'] for r in rows]):.1f} s of processor time)")
    sys.stdout.flush()


_SAVED = ("white_rms", "chan_rms", "p", "white_pull", "family", "cost", "t_grid", "seed")


def save_rows(path, results):
    """Keep each scenario's per-seed figures (``{label: (n_exposures, rows)}``) in one ``.npz``."""
    out = {}
    for label, (n_exp, rows) in results.items():
        out[f"{label}|n_exposures"] = np.array(n_exp)
        out[f"{label}|pulls"] = np.array([r["pulls"] for r in rows])
        for key in _SAVED:
            out[f"{label}|{key}"] = np.array([r[key] for r in rows])
    np.savez(path, **out)


def load_rows(paths):
    """Per-seed figures of saved runs, pooled by scenario: ``{label: (n_exposures, rows)}``."""
    pooled = {}
    for path in paths:
        with np.load(path) as data:
            labels = sorted({k.split("|")[0] for k in data.files})
            for label in labels:
                n_exp = int(data[f"{label}|n_exposures"])
                rows = [dict({key: data[f"{label}|{key}"][i].item() for key in _SAVED},
                             pulls=np.asarray(data[f"{label}|pulls"][i], float))
                        for i in range(len(data[f"{label}|pulls"]))]
                pooled.setdefault(label, (n_exp, []))[1].extend(rows)
    return pooled


def _grid_cost(lc_path, visit, single):
    """Processor seconds of the default grid's fit and of one model's, side by side.

    Processor time of this process (``time.process_time``), which other
    processes on a shared machine disturb far less than wall time; the single
    model's fit, a fraction of a second, is the fastest of three.
    """
    from lightledger.pipeline.grid import fit_grid
    from lightledger.pipeline.modelspec import parse_grid
    from lightledger.tasks.detrend import grid_setup
    from lightledger.tasks.lightcurves import read_lightcurves
    lc, channels = read_lightcurves(lc_path)
    params = dict(visit.stages["detrend"])
    out = {}
    for label, models, repeat in (("grid", (), 1), ("single", (single,), 3)):
        params["models"] = models
        specs, curves, options, _ = grid_setup(lc, channels, visit.event, params)
        best = np.inf
        for _ in range(repeat):
            t0 = time.process_time()
            fit_grid(parse_grid([s.name for s in specs]), curves, visit.event, **options)
            best = min(best, time.process_time() - t0)
        out[label] = best
    return out["grid"], out["single"]


def run_one(root, label, seed, n_exposures):
    from astropy.table import Table
    from scipy.stats import chi2

    from lightledger.synthetic_data.render import render
    from lightledger.tasks.config import load_visit
    from lightledger.tasks.run import reduce_visit

    scenario, ramps, family, single = SCENARIOS[label]
    outdir = Path(root) / f"{label}-{seed}"
    kwargs = dict(seed=seed, n_exposures=n_exposures)
    if ramps != "exponential":
        kwargs["ramps"] = ramps
    visit = render(scenario, outdir, **kwargs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        result = reduce_visit(visit, workers=1)
    if not result.ok:
        raise SystemExit("\n".join(result.messages))
    depths = Table.read(result.final, hdu="DEPTHS")
    grid = Table.read(result.final, hdu="GRID")
    wdepth, cdepth, wlimit, climit = _truth(outdir)
    white = depths[0]
    chans = depths[1:]
    pulls = (np.asarray(chans["depth"]) - cdepth) / np.asarray(chans["depth_error"])
    lc_path = sorted(Path(result.final).parent.parent.glob("bin-*/lightcurves.fits"))[-1]
    t_grid, t_single = _grid_cost(lc_path, load_visit(visit), single)
    return {
        "white_rms": float(white["rms_dof_ppm"]) * 1e-6 / wlimit,
        "chan_rms": float(np.median(np.asarray(chans["rms_dof_ppm"]) * 1e-6 / climit)),
        "p": float(chi2.sf(np.sum(pulls ** 2), pulls.size)),
        "pulls": pulls,
        "white_pull": (float(white["depth"]) - wdepth) / float(white["depth_error"]),
        "family": _family_weight(grid, family),
        "cost": t_grid / t_single,
        "t_grid": t_grid,
        "seed": seed,
    }


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, default=8)
    parser.add_argument("--first", type=int, default=1, help="first seed")
    parser.add_argument("--exposures", type=int, default=None,
                        help="exposures per visit (default 60 for scans, 150 for the stare)")
    parser.add_argument("--scenarios", nargs="+", default=["scan-exponential", "scan-traps"],
                        choices=sorted(SCENARIOS))
    parser.add_argument("--keep", type=Path, default=None,
                        help="keep the rendered visits and their notebooks in this directory")
    parser.add_argument("--save", type=Path, default=None,
                        help="write each seed's figures to this .npz file")
    parser.add_argument("--pool", type=Path, nargs="+", default=None,
                        help="print the pooled figures of runs saved with --save, reducing nothing")
    args = parser.parse_args(argv)
    if args.pool:
        for label, (n_exp, rows) in load_rows(args.pool).items():
            summarise(label, rows, n_exp)
        return 0
    if args.keep is not None:
        args.keep.mkdir(parents=True, exist_ok=True)
    results = {}
    with tempfile.TemporaryDirectory(prefix="bench-grid-") as tmp:
        root = tmp if args.keep is None else args.keep
        for label in args.scenarios:
            n_exp = args.exposures or (150 if label == "stare" else 60)
            rows = []
            for seed in range(args.first, args.first + args.seeds):
                t0 = time.perf_counter()
                r = run_one(root, label, seed, n_exp)
                rows.append(r)
                print(f"  {label} seed {seed}: p {r['p']:.3f}, channel pull std "
                      f"{np.std(r['pulls']):.2f}, white pull {r['white_pull']:+.2f}, family weight "
                      f"{r['family']:.2f}, grid/single {r['cost']:.1f} ({time.perf_counter() - t0:.0f} s)",
                      file=sys.stderr, flush=True)
            results[label] = (n_exp, rows)
            summarise(label, rows, n_exp)
            if args.save is not None:
                save_rows(args.save, results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
