"""Channels made without explicit edges cover the lit part of the spectrum only.

The lit part: where the median spectrum (5-pixel running median) reaches
bin.lit_threshold (5 %) of its peak (pipeline/lit.py).  The scenarios'
detectors are wider than their band-passes, so channels over the whole
extracted spectrum would end in dark, noise-only channels (common practice:
an observer trims or flags them).
"""

import json

import numpy as np
import pytest
from astropy.table import Table

from lightledger.pipeline.parameters import resolve


def _channels(folder):
    path = folder / "lightcurves.fits"
    return Table.read(path, hdu="CHANNELS"), Table.read(path, hdu="SPECTRUM")


@pytest.mark.slow
@pytest.mark.parametrize("which", ["scan_visit", "stare_visit"])
def test_default_and_many_channels_all_have_light(which, request, rebin):
    visit = request.getfixturevalue(which)
    threshold = resolve("bin")["lit_threshold"]
    for settings in ([("bin", "edges", ())],
                     [("bin", "edges", ()), ("bin", "n_channels", 25)]):
        channels, spectrum = _channels(rebin(visit, settings))
        n = dict((k, v) for _, k, v in settings).get("n_channels", resolve("bin")["n_channels"])
        assert len(channels) == n
        assert not np.any(channels["dim"]) and np.all(channels["light"] >= threshold), (
            settings, list(np.round(channels["light"], 3)))
        # the channels end where the light ends: inside the extracted spectrum, and the
        # pixels just outside them are dark
        lo, hi = float(channels["wave_lo"][0]), float(channels["wave_hi"][-1])
        wave = 0.5 * (np.asarray(spectrum["wave_lo"]) + np.asarray(spectrum["wave_hi"]))
        flux = np.asarray(spectrum["flux"], float)
        assert lo > wave[0] and hi < wave[-1]
        outside = (wave < lo - 0.01) | (wave > hi + 0.01)
        assert np.all(flux[outside] < threshold * np.max(flux))


@pytest.mark.slow
def test_explicit_channels_over_the_whole_detector_flag_the_unlit_ends(scan_visit, rebin):
    from lightledger.tasks.lightcurves import read_spectra

    edges = read_spectra(scan_visit.product("extract", "spectra.fits"))[3]
    # 25 channels over (nearly) every pixel: 2 nm inside the ends, which the validation
    # pass compares with the profile's nominal wavelengths
    whole = np.linspace(edges[0] + 0.002, edges[-1] - 0.002, 26)
    folder = rebin(scan_visit, [("bin", "edges", tuple(whole))])
    channels, _ = _channels(folder)
    dim = np.asarray(channels["dim"], bool)
    entry = json.loads((folder / "entry.json").read_text())
    assert sum("is dim" in w for w in entry["warnings"]) == dim.sum()
    assert set(entry["not_applying"]) == {"width", "n_channels", "equal_counts"}
    assert dim[0] and dim[-1] and not dim[len(dim) // 2]
    # dim channels are the ends only: once lit, lit until the other end
    lit = np.flatnonzero(~dim)
    assert np.all(np.diff(lit) == 1)
