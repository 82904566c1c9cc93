"""Phase curves and programmes: precision, pulls and run time (acceptance of the phase-curve work).

    python tests/benchmarks/bench_phase.py [--seed N] [--workers W] [--seeds K]
                                           [--skip-pixels] [--skip-study]
                                           [--scenarios phase-orbit phase-pair] [--first-seed S]

Part 1 (pixels): renders ``phase-orbit`` at its default size (21 orbits, 294
exposures) and ``phase-pair`` (two visits of 5 orbits) into a temporary
directory, reads every raw file once (the I/O floor), reduces them
(``lightledger reduce VISIT.toml`` / ``PROGRAMME.toml``), and prints for each:

* white and median-channel residual rms per degree of freedom over the
  precision limit (the truth's ``white_sigma`` / ``channel_sigma``, an ideal
  optimal extraction of the rendered photons; aim at most 1.05);
* the pulls (fit - truth) / error of the hotspot offset, peak-to-trough
  amplitude, eclipse depth (day side) and transit depth, white band and the
  channels' mean and scatter;
* the run time over the time to read the raw files once.

Part 2 (light curves, many seeds): the injection-recovery study of
tests/test_phase_injection.py at the scenarios' default sizes with the detrend
stage's full ramp grid over ``--seeds`` noise seeds: the pulls' mean and
scatter per quantity (aim: near 0 and 1) and the fractions within 1 and 2
(aim: 0.68 and 0.95; for a quantity measured at a signal-to-noise ratio of a
few, e.g. the amplitude and offset of two short visits, the pulls are not
Gaussian and the fractions say more than the scatter), and for ``phase-pair`` the joint
fit's eclipse-depth error over the eclipse visit's own (the median over seeds,
from the given variances and as reported).

Ratios measured side by side in one run; no time is asserted anywhere.
"""

import argparse
import importlib.util
import os
import shutil
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def _injection_module():
    spec = importlib.util.spec_from_file_location("phase_injection",
                                                  HERE.parent / "test_phase_injection.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def read_floor(raw_dirs):
    """Seconds to read every READS array once into float32 (warm page cache)."""
    from astropy.io import fits

    t0 = time.perf_counter()
    for raw in raw_dirs:
        for path in sorted(Path(raw).glob("*.fits")):
            with fits.open(path, memmap=False) as hdul:
                np.asarray(hdul["READS"].data, dtype=np.float32)
    return time.perf_counter() - t0


def _pull(value, error, truth):
    return (value - truth) / error if error and np.isfinite(error) and error > 0 else np.nan


def report_pixels(name, planet_fits, truths, detrended):
    """Print the precision and pulls of one reduced scenario."""
    from astropy.io import fits
    from astropy.table import Table

    P = Table.read(planet_fits, hdu="PLANET").filled(np.nan)
    truth_exp = [Table.read(t, hdu="EXPOSURES") for t in truths]
    head = fits.getheader(truths[0], "CHANNELS")
    C = Table.read(truths[0], hdu="CHANNELS")
    # precision limit: rms of the truth's relative sigma over the fitted exposures
    lim_w, lim_c = [], []
    for det_path, tr in zip(detrended, truth_exp):
        det = Table.read(det_path, hdu="DETRENDED")
        used = np.asarray(det["used"], bool)
        lim_w.append((np.asarray(tr["white_sigma"]) / np.asarray(tr["white_flux"]))[used])
        lim_c.append((np.asarray(tr["channel_sigma"]) / np.asarray(tr["channel_flux"]))[used])
    lim_w = np.sqrt(np.mean(np.concatenate(lim_w) ** 2)) * 1e6
    lim_c = np.sqrt(np.mean(np.concatenate(lim_c) ** 2, axis=0)) * 1e6
    w = P[P["channel"] == -1][0]
    ch = P[P["channel"] >= 0]
    ratio_w = w["rms_dof_ppm"] / lim_w
    ratios_c = np.asarray(ch["rms_dof_ppm"]) / lim_c
    print(f"\n{name}")
    print(f"  white rms per dof {w['rms_dof_ppm']:.1f} ppm, precision limit {lim_w:.1f} ppm, "
          f"ratio {ratio_w:.3f} (aim <= 1.05)")
    print(f"  median channel ratio {np.median(ratios_c):.3f} (channels {np.round(ratios_c, 3)})")
    t_amp = np.asarray(C["max_flux"]) - np.asarray(C["min_flux"])
    rows = (("offset", "offset_deg", "offset_error_deg", head["OFFSET"],
             np.full(len(ch), head["OFFSET"])),
            ("amplitude", "amplitude", "amplitude_error", head["WMAX"] - head["WMIN"], t_amp),
            ("eclipse depth", "eclipse_depth", "eclipse_depth_error", head["WECLIPSE"],
             np.asarray(C["eclipse_flux"])),
            ("night side", "night_flux", "night_flux_error", head["WNIGHT"],
             np.asarray(C["night_flux"])),
            ("transit depth", "transit_depth", "transit_depth_error", head["WDEPTH"],
             np.asarray(C["depth"])))
    print(f"  {'pull':<15}{'white':>8}{'channels mean':>15}{'scatter':>9}{'|pull|<2':>10}")
    for label, col, err, tw, tc in rows:
        pw = _pull(w[col], w[err], tw)
        d = np.asarray(ch[col]) - tc
        if col == "offset_deg":
            d = (d + 180) % 360 - 180
            pw = ((w[col] - tw + 180) % 360 - 180) / w[err]
        pc = d / np.asarray(ch[err])
        ok = np.isfinite(pc)
        print(f"  {label:<15}{pw:>8.2f}{np.mean(pc[ok]) if ok.any() else np.nan:>15.2f}"
              f"{np.std(pc[ok]) if ok.sum() > 1 else np.nan:>9.2f}"
              f"{np.mean(np.abs(pc[ok]) < 2) if ok.any() else np.nan:>10.2f}")
    return ratio_w, float(np.median(ratios_c))


def run_pixels(seed, workers, tmp):
    from lightledger.synthetic_data.render import render
    from lightledger.tasks.programme import reduce_programme
    from lightledger.tasks.run import reduce_visit

    out = {}
    for name in ("phase-orbit", "phase-pair"):
        folder = Path(tmp) / name
        t0 = time.perf_counter()
        path = render(name, folder, seed=seed)
        t_render = time.perf_counter() - t0
        pair = name == "phase-pair"
        raws = [folder / v / "raw" for v in ("visit-eclipse", "visit-transit")] if pair \
            else [folder / "raw"]
        t_read = min(read_floor(raws) for _ in range(2))
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            result = (reduce_programme if pair else reduce_visit)(path, workers=workers)
        t_reduce = time.perf_counter() - t0
        if not result.ok:
            raise SystemExit(f"bench_phase: {name} did not reduce: " + "; ".join(result.messages))
        planet = Path(result.final)
        if pair:
            truths = [folder / v / "truth.fits" for v in ("visit-eclipse", "visit-transit")]
            dets = [planet.parent / "detrended-1.fits", planet.parent / "detrended-2.fits"]
        else:
            truths, dets = [folder / "truth.fits"], [planet.parent / "detrended.fits"]
        ratios = report_pixels(f"{name}: render {t_render:.0f} s", planet, truths, dets)
        print(f"  run time {t_reduce:.1f} s, raw read {t_read:.2f} s, run / read "
              f"{t_reduce / t_read:.0f} ({workers} workers)")
        out[name] = (ratios, t_reduce / t_read)
    return out


def run_study(n_seeds, scenarios=("phase-orbit", "phase-pair"), first=0):
    inj = _injection_module()
    from lightledger.pipeline.programme import quantity

    for name in scenarios:
        visits, planet = inj.simulate_curves(name, seed=7)
        pulls = {k: [] for k in ("eclipse_depth", "night_flux", "amplitude", "offset_deg")}
        ratios, ratios_reported = [], []
        t0 = time.perf_counter()
        for s in range(first, first + n_seeds):
            joint, alone, truth = inj.fit_curves(visits, planet, noise_seed=1000 + s,
                                                 alone=name == "phase-pair")
            for k, v in inj.pulls(joint, truth).items():
                pulls[k].append(v)
            if alone is not None:
                j, a = joint.white, alone[0].white
                ratios.append((quantity(j, "eclipse_depth")[1] / j.error_scale)
                              / (quantity(a, "eclipse_depth")[1] / a.error_scale))
                ratios_reported.append(quantity(j, "eclipse_depth")[1]
                                       / quantity(a, "eclipse_depth")[1])
        print(f"\n{name}: {n_seeds} noise seeds at the default size, light-curve level "
              f"({time.perf_counter() - t0:.0f} s)")
        print(f"  {'pull':<15}{'white mean':>11}{'white sd':>9}{'chan mean':>10}{'chan sd':>9}"
              f"{'|pull|<1':>10}{'|pull|<2':>10}")
        for k, v in pulls.items():
            z = np.array(v)                    # (seeds, 1 + channels)
            zc = z[:, 1:].ravel()
            zc = zc[np.isfinite(zc)]
            print(f"  {k:<15}{np.nanmean(z[:, 0]):>11.2f}{np.nanstd(z[:, 0]):>9.2f}"
                  f"{np.mean(zc):>10.2f}{np.std(zc):>9.2f}{np.mean(np.abs(zc) < 1):>10.2f}"
                  f"{np.mean(np.abs(zc) < 2):>10.2f}")
        if ratios:
            print(f"  joint / eclipse visit alone, white eclipse-depth error: median "
                  f"{np.median(ratios):.3f} from the variances, {np.median(ratios_reported):.3f} "
                  f"as reported; joint smaller in {np.mean(np.array(ratios) < 1):.0%} of seeds")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seeds", type=int, default=20, help="noise seeds of the study")
    ap.add_argument("--skip-pixels", action="store_true")
    ap.add_argument("--skip-study", action="store_true")
    ap.add_argument("--scenarios", nargs="+", default=["phase-orbit", "phase-pair"],
                    choices=["phase-orbit", "phase-pair"], help="scenarios of the study")
    ap.add_argument("--first-seed", type=int, default=0,
                    help="first noise seed of the study (seeds 1000 + first ...)")
    args = ap.parse_args(argv)
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    if not args.skip_pixels:
        tmp = tempfile.mkdtemp(prefix="bench-phase-")
        try:
            run_pixels(args.seed, args.workers, tmp)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
    if not args.skip_study:
        run_study(args.seeds, tuple(args.scenarios), args.first_seed)


if __name__ == "__main__":
    sys.exit(main())
