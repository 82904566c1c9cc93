"""The bin stage's steps on the aligned spectra: medians, channel edges, binning in blocks.

Each works a block of exposures or pixels at a time, so that the memory of
the temporaries does not grow with the visit (the spectra stay as stored,
float32; sums and medians are in float64).
"""

import warnings

import numpy as np

from lightledger.pipeline.binning import (BinnedSpectra, bin_spectra, channel_edges_from_list,
                                          equal_count_channel_edges, uniform_channel_edges)
from lightledger.pipeline.errors import ParameterError


#: Exposures binned at a time: the temporaries of binning scale with a block, not the visit.
BLOCK_ROWS = 1024


def _median_over_exposures(values, good, columns=32):
    """Median over exposures of each pixel, from the good values, a block of pixels at a time."""
    out = np.empty(values.shape[1])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)          # a pixel bad in every exposure
        for a in range(0, values.shape[1], columns):
            block = np.asarray(values[:, a:a + columns], float)
            out[a:a + columns] = np.nanmedian(np.where(good[:, a:a + columns], block, np.nan), axis=0)
    return out


def _bin_in_blocks(pix_edges, flux, var, mask, edges, scale=None, fill_spec=None, fill_var=None):
    """:func:`bin_spectra` over blocks of :data:`BLOCK_ROWS` exposures (the same numbers: it
    treats every exposure on its own), with the fill of each block scaled per exposure."""
    parts = []
    for a in range(0, len(flux), BLOCK_ROWS):
        rows = slice(a, a + BLOCK_ROWS)
        fill = fvar = None
        if fill_spec is not None:
            fill = fill_spec[None, :] * scale[rows, None]
            fvar = fill_var[None, :] * scale[rows, None]
        parts.append(bin_spectra(pix_edges, np.asarray(flux[rows], float), np.asarray(var[rows], float),
                                 mask[rows], edges, fill=fill, fill_variance=fvar))
    first = parts[0]
    return BinnedSpectra(flux=np.concatenate([p.flux for p in parts]),
                         variance=np.concatenate([p.variance for p in parts]),
                         mask=np.concatenate([p.mask for p in parts]),
                         n_filled=np.concatenate([p.n_filled for p in parts]),
                         weights=first.weights, channel_edges=first.channel_edges)


def _bridge(values):
    """Fill non-finite entries by linear interpolation between finite neighbours.

    A pixel bad in every exposure (e.g. a bad column under a box extraction)
    takes its neighbours' value, so that it can be filled rather than flag its
    channel in every exposure; 0 where nothing is finite.
    """
    values = np.asarray(values, float)
    ok = np.isfinite(values)
    if ok.all() or not ok.any():
        return np.where(ok, values, 0.0)
    index = np.arange(values.size)
    return np.where(ok, values, np.interp(index, index[ok], values[ok]))


def _channel_edges(params, pixel_edges, mean_spectrum, lit):
    """Channel edges: the visit's list, or channels made over the lit range ``lit``."""
    lo, hi = float(np.min(pixel_edges)), float(np.max(pixel_edges))
    if params["edges"]:
        edges = channel_edges_from_list(params["edges"])
    elif params["width"] > 0:
        if params["width"] > lit.hi - lit.lo:
            raise ParameterError(f"bin.width: {params['width']:g} um is wider than the lit part of "
                                 f"the spectrum, {lit.lo:.4f}-{lit.hi:.4f} um")
        edges = uniform_channel_edges((lit.lo, lit.hi), width=params["width"])
    elif params["equal_counts"]:
        edges = equal_count_channel_edges(pixel_edges, mean_spectrum, params["n_channels"],
                                          wavelength_range=(lit.lo, lit.hi))
    else:
        edges = uniform_channel_edges((lit.lo, lit.hi), n_channels=params["n_channels"])
    edges = np.asarray(edges, float)
    if edges[0] < lo - 1e-9 or edges[-1] > hi + 1e-9:
        raise ParameterError(f"bin.edges: channels {edges[0]:.4f}-{edges[-1]:.4f} um reach outside "
                             f"the extracted spectrum's {lo:.4f}-{hi:.4f} um")
    return edges
