"""The demo: render a small fictional scan visit, reduce it, compare with its truth.

This is the one place where the reducer and the forward model meet: the
reduction itself never reads the truth; only the closing table does.
"""

import sys
import time
from pathlib import Path

import numpy as np
from astropy.io import fits

from .detrendtables import read_depths
from .run import reduce_visit

__all__ = ["run_demo", "truth_summary", "DEMO_SCENARIO"]

DEMO_SCENARIO = "scan-transit"


def truth_summary(truth_path):
    """Injected white depth and the white precision limit (ppm) from a truth file."""
    with fits.open(truth_path) as hdul:
        exp = hdul["EXPOSURES"].data
        header = hdul["CHANNELS"].header
        limit = np.median(exp["white_sigma"] / exp["white_flux"]) * 1e6
        depth = float(header["WDEPTH"])
        channel_depths = np.asarray(hdul["CHANNELS"].data["depth"], float)
    return {"white_depth": depth, "white_limit_ppm": float(limit), "channel_depths": channel_depths}


def run_demo(directory, *, n_exposures=60, seed=1, workers=2, progress=None, out=None):
    """Render, reduce and summarise; returns the process exit status."""
    from lightledger.synthetic_data.render import render

    out = out or sys.stdout
    directory = Path(directory).resolve()
    started = time.time()
    print(f"lightledger demo: rendering a fictional scan visit of {n_exposures} exposures "
          f"into {directory}", file=out)
    visit = render(DEMO_SCENARIO, directory, seed=seed, n_exposures=n_exposures,
                   progress=(lambda d, t: progress("simulate", "exposures", d, t)) if progress else None)
    print(f"lightledger demo: reducing {visit}", file=out)
    result = reduce_visit(visit, workers=workers, progress=progress)
    for line in result.messages:
        print(line, file=sys.stderr)
    if not result.ok:
        return 1
    truth = truth_summary(directory / "truth.fits")
    depths = read_depths(result.final)
    white = depths[depths["channel"] == -1][0]
    depth, error = float(white["depth"]), float(white["depth_error"])
    pull = (depth - truth["white_depth"]) / error
    chans = depths[depths["channel"] >= 0]
    chan_pull = (np.asarray(chans["depth"]) - truth["channel_depths"]) / np.asarray(chans["depth_error"])
    rows = [
        ("white-light rms (ppm)", f"{white['rms_dof_ppm']:.0f}",
         f"precision limit {truth['white_limit_ppm']:.0f}",
         f"ratio {white['rms_dof_ppm'] / truth['white_limit_ppm']:.2f}"),
        ("white depth (ppm)", f"{depth * 1e6:.0f} +/- {error * 1e6:.0f}",
         f"injected {truth['white_depth'] * 1e6:.0f}", f"{pull:+.1f} sigma"),
        ("channel depths", f"{len(chans)} channels", "pull rms",
         f"{np.sqrt(np.mean(chan_pull ** 2)):.2f}"),
    ]
    print("", file=out)
    print(f"products: {result.final.parent.parent}", file=out)
    print(f"notebook page: {result.page}", file=out)
    lightcurves = sorted(result.final.parent.parent.glob("bin-*/lightcurves.ecsv"),
                         key=lambda p: p.stat().st_mtime)[-1]
    print(f"light curves for your fitter: {lightcurves}", file=out)
    print(f"detrended light curves and depths: {result.final}", file=out)
    print("", file=out)
    print(f"{'':<24}{'recovered':<22}{'truth':<24}{'':<12}", file=out)
    # the rms is of the fit's residuals, scaled by sqrt(N / (N - n_params)) for the fitted terms
    for row in rows:
        print(f"{row[0]:<24}{row[1]:<22}{row[2]:<24}{row[3]:<12}", file=out)
    print(f"\ndone in {time.time() - started:.0f} s", file=out)
    return 0
