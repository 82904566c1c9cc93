"""Spectroscopic channels: choosing their edges and binning 1-D spectra into them.

Masks follow the project's contract: a boolean ``mask`` is True where a pixel
is bad.  A bad pixel is never dropped silently: :func:`bin_spectra` either
fills it from a model value the caller provides or flags every channel and
exposure it touches.

Wavelengths are in micrometres; fluxes are electrons per pixel (any additive
per-pixel quantity works), variances their squares.
"""

from dataclasses import dataclass

import numpy as np

from .errors import AllMaskedError, ParameterError

__all__ = ["BinnedSpectra", "channel_edges_from_list", "uniform_channel_edges",
           "equal_count_channel_edges", "white_band_edges", "overlap_weights",
           "bin_spectra"]


def _strip_um(value):
    """Plain float array in micrometres from an array or a Quantity."""
    if hasattr(value, "unit") and hasattr(value, "to_value"):
        import astropy.units as u
        return np.asarray(value.to_value(u.um), dtype=float)
    return np.asarray(value, dtype=float)


def _check_range(wavelength_range, name="wavelength_range"):
    rng_ = _strip_um(wavelength_range).ravel()
    if rng_.size != 2 or not np.all(np.isfinite(rng_)) or not rng_[1] > rng_[0]:
        raise ParameterError(f"{name} must be two finite wavelengths (um) with "
                             f"start < stop; got {wavelength_range!r}")
    return float(rng_[0]), float(rng_[1])


def _check_edges(edges, name):
    e = _strip_um(edges)
    if e.ndim != 1 or e.size < 2 or not np.all(np.isfinite(e)):
        raise ParameterError(f"{name} must be a 1-D array of at least two finite "
                             f"wavelengths (um); got shape {e.shape}")
    return e


def channel_edges_from_list(edges):
    """Channel edges from an explicit list of wavelengths.

    Parameters
    ----------
    edges : array_like of float, shape (n_channels + 1,)
        Wavelengths in um (or a Quantity), strictly increasing; channel ``j``
        spans ``edges[j]`` to ``edges[j + 1]``.

    Returns
    -------
    edges : ndarray of float, shape (n_channels + 1,)
        A new array in um.
    """
    return _increasing(edges, "edges")


def _increasing(edges, name):
    e = _check_edges(edges, name).copy()
    if not np.all(np.diff(e) > 0):
        raise ParameterError(f"{name} must be strictly increasing wavelengths (um)")
    return e


def uniform_channel_edges(wavelength_range, *, width=None, n_channels=None):
    """Channels of equal width over a wavelength range.

    Give exactly one of ``width`` or ``n_channels``.  With ``width``, the
    channels start at ``wavelength_range[0]`` and the last one that fits
    entirely inside the range is the last channel (the remainder is left out).

    Parameters
    ----------
    wavelength_range : (float, float)
        Start and stop in um.
    width : float, optional
        Channel width in um, > 0.
    n_channels : int, optional
        Number of channels, >= 1.

    Returns
    -------
    edges : ndarray of float, shape (n_channels + 1,)
        In um.
    """
    lo, hi = _check_range(wavelength_range)
    if (width is None) == (n_channels is None):
        raise ParameterError("give exactly one of width (um, > 0) or n_channels (int >= 1)")
    if n_channels is not None:
        n = int(n_channels)
        if n < 1 or n != n_channels:
            raise ParameterError(f"n_channels must be an integer >= 1; got {n_channels!r}")
        return np.linspace(lo, hi, n + 1)
    w = float(_strip_um(width))
    if not (np.isfinite(w) and w > 0):
        raise ParameterError(f"width must be a finite width in um > 0; got {width!r}")
    # A small tolerance so that a range that is an exact multiple of the width
    # in decimal is not shortened by one channel through rounding.
    n = int(np.floor((hi - lo) / w * (1 + 1e-12)))
    if n < 1:
        raise ParameterError(f"width must not exceed the range {hi - lo:g} um; got {w:g}")
    return lo + w * np.arange(n + 1)


def equal_count_channel_edges(pixel_edges_um, mean_spectrum, n_channels, *,
                              wavelength_range=None):
    """Channels that each hold the same number of photons of a mean spectrum.

    The spectrum's counts are taken as spread uniformly over each pixel, so the
    cumulative count is piecewise linear in wavelength and its inverse gives
    the edges exactly.  Non-finite values of ``mean_spectrum`` (masked pixels
    already set to NaN) and negative values count as zero photons.

    Parameters
    ----------
    pixel_edges_um : array_like of float, shape (nx + 1,)
        Wavelength edges of the pixels in um, monotonic (increasing or
        decreasing along x).
    mean_spectrum : array_like of float, shape (nx,)
        Counts per pixel (e.g. the median over exposures).
    n_channels : int
        Number of channels, >= 1.
    wavelength_range : (float, float), optional
        Restrict to this range (um); default the whole pixel range.

    Returns
    -------
    edges : ndarray of float, shape (n_channels + 1,)
        Strictly increasing, in um; the first and last edges are the range.
    """
    pe = _check_edges(pixel_edges_um, "pixel_edges_um")
    spec = np.asarray(mean_spectrum, dtype=float)
    if spec.shape != (pe.size - 1,):
        raise ParameterError(f"mean_spectrum must have shape ({pe.size - 1},) to match "
                             f"pixel_edges_um; got {spec.shape}")
    n = int(n_channels)
    if n < 1 or n != n_channels:
        raise ParameterError(f"n_channels must be an integer >= 1; got {n_channels!r}")
    d = np.diff(pe)
    if not (np.all(d > 0) or np.all(d < 0)):
        raise ParameterError("pixel_edges_um must be strictly monotonic")
    if d[0] < 0:
        pe, spec = pe[::-1], spec[::-1]
    if wavelength_range is None:
        lo, hi = float(pe[0]), float(pe[-1])
    else:
        lo, hi = _check_range(wavelength_range)
        if lo < pe[0] or hi > pe[-1]:
            raise ParameterError(f"wavelength_range must lie within the pixels' range "
                                 f"[{pe[0]:g}, {pe[-1]:g}] um; got [{lo:g}, {hi:g}]")
    counts = np.where(np.isfinite(spec) & (spec > 0), spec, 0.0)
    cum = np.concatenate([[0.0], np.cumsum(counts)])
    c_lo, c_hi = np.interp([lo, hi], pe, cum)
    if not c_hi > c_lo:
        raise AllMaskedError("mean_spectrum has no positive finite counts in the "
                             "wavelength_range")
    targets = c_lo + (c_hi - c_lo) * np.arange(1, n) / n
    # Invert the cumulative count.  Zero-count pixels make it flat; keep the
    # strictly increasing part only so that np.interp is well defined.
    keep = np.concatenate([[True], np.diff(cum) > 0])
    inner = np.interp(targets, cum[keep], pe[keep])
    edges = np.concatenate([[lo], inner, [hi]])
    if not np.all(np.diff(edges) > 0):
        raise ParameterError(f"n_channels={n} is too many for the counts in the range: "
                             "two edges coincide; use fewer channels")
    return edges


def white_band_edges(wavelength_range):
    """Edges of a single white-light channel over a wavelength range.

    Parameters
    ----------
    wavelength_range : (float, float)
        Start and stop in um.

    Returns
    -------
    edges : ndarray of float, shape (2,)
    """
    lo, hi = _check_range(wavelength_range)
    return np.array([lo, hi])


def overlap_weights(pixel_edges_um, channel_edges):
    """Fraction of each pixel that falls inside each channel.

    Parameters
    ----------
    pixel_edges_um : array_like of float, shape (nx + 1,)
        Pixel edges in um, strictly monotonic (either direction).
    channel_edges : array_like of float, shape (n_channels + 1,)
        Channel edges in um, strictly increasing.

    Returns
    -------
    weights : ndarray of float, shape (nx, n_channels)
        ``weights[i, j]`` = length of pixel ``i`` inside channel ``j`` divided
        by the pixel's length, in [0, 1].  Memory nx * n_channels floats.
    """
    pe = _check_edges(pixel_edges_um, "pixel_edges_um")
    ce = _increasing(channel_edges, "channel_edges")
    d = np.diff(pe)
    if not (np.all(d > 0) or np.all(d < 0)):
        raise ParameterError("pixel_edges_um must be strictly monotonic")
    p_lo = np.minimum(pe[:-1], pe[1:])[:, None]
    p_hi = np.maximum(pe[:-1], pe[1:])[:, None]
    c_lo = ce[:-1][None, :]
    c_hi = ce[1:][None, :]
    inside = np.clip(np.minimum(p_hi, c_hi) - np.maximum(p_lo, c_lo), 0.0, None)
    weights = inside / (p_hi - p_lo)
    # A pixel lying wholly inside a channel gets exactly 1 (not 1 - eps), so
    # that flux is conserved to rounding of the sums only.
    whole = (p_lo >= c_lo) & (p_hi <= c_hi)
    weights[whole] = 1.0
    return weights


@dataclass(frozen=True)
class BinnedSpectra:
    """Spectra binned into channels; returned by :func:`bin_spectra`.

    Attributes
    ----------
    flux : ndarray of float, shape (n_exposures, n_channels)
        Electrons per channel.  NaN where ``mask`` is True.
    variance : ndarray of float, shape (n_exposures, n_channels)
        Variance of ``flux`` (electrons^2).  NaN where ``mask`` is True.
    mask : ndarray of bool, shape (n_exposures, n_channels)
        True where a bad pixel that could not be filled touches the channel.
    n_filled : ndarray of int, shape (n_exposures, n_channels)
        Number of pixels with non-zero weight in the channel whose value was
        replaced from ``fill``.
    weights : ndarray of float, shape (nx, n_channels)
        The overlap weights used (see :func:`overlap_weights`).
    channel_edges : ndarray of float, shape (n_channels + 1,)
        In um.
    """

    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    n_filled: np.ndarray
    weights: np.ndarray
    channel_edges: np.ndarray

    @property
    def wavelength(self):
        """Channel centres in um, shape (n_channels,)."""
        return 0.5 * (self.channel_edges[:-1] + self.channel_edges[1:])


def bin_spectra(pixel_edges_um, flux, variance, mask, channel_edges, *,
                fill=None, fill_variance=None):
    """Sum 1-D spectra into wavelength channels, conserving flux.

    ``mask`` is True where a pixel is bad; a pixel whose flux or variance is
    not finite, or whose variance is negative, counts as bad too.  Each bad
    pixel with non-zero weight in a channel is either replaced by the model
    value ``fill`` (when given and finite there) or flags that
    channel-exposure: its ``mask`` is True and its flux and variance are NaN.
    A bad pixel is never dropped silently.  Inputs are not modified.

    Parameters
    ----------
    pixel_edges_um : array_like of float, shape (nx + 1,)
        Pixel edges in um, strictly monotonic.
    flux : array_like of float, shape (n_exposures, nx)
        Electrons per pixel.
    variance : array_like of float, shape (n_exposures, nx)
        Variance of ``flux`` (electrons^2).
    mask : array_like of bool, shape (n_exposures, nx) or (nx,)
        True = bad pixel.
    channel_edges : array_like of float, shape (n_channels + 1,)
        Strictly increasing, in um, within the pixels' wavelength range.
    fill : array_like of float, broadcastable to (n_exposures, nx), optional
        Model electrons per pixel used in place of bad pixels, e.g. the
        profile-fit prediction or the median spectrum scaled to each
        exposure's total.  Default None: no filling, flag instead.
    fill_variance : array_like of float, broadcastable to (n_exposures, nx), optional
        Variance given to a filled pixel.  Default: the pixel's own
        ``variance`` where that is finite and >= 0; where it is not, the
        channel-exposure is flagged.

    Returns
    -------
    BinnedSpectra

    Notes
    -----
    With overlap weights :math:`w_{ij}` (fraction of pixel :math:`i` inside
    channel :math:`j`, see :func:`overlap_weights`) the channel flux is the
    linear combination :math:`F_j = \\sum_i w_{ij} f_i`.  Flux is conserved:
    :math:`\\sum_j w_{ij} = 1` for a pixel wholly inside the channels' range,
    so :math:`\\sum_j F_j = \\sum_i f_i` over those pixels.  For independent
    pixel errors, the variance of a linear combination is

    .. math:: \\mathrm{Var}(F_j) = \\sum_i w_{ij}^2 \\, \\sigma_i^2 ,

    with the weights squared (a pixel split between channels puts the fraction
    :math:`w` of its counts, hence :math:`w^2` of its variance, in each).
    Channels that share a split pixel are correlated, with covariance
    :math:`w_{ij} w_{ik} \\sigma_i^2`; it is not returned.

    Cost: time and memory O(n_exposures * nx * n_channels) (two matrix
    products with the dense weight matrix).

    References
    ----------
    Carnall 2017, arXiv:1705.05165 (flux-conserving resampling onto new bins).
    """
    pe = _check_edges(pixel_edges_um, "pixel_edges_um")
    f = np.asarray(flux, dtype=float)
    v = np.asarray(variance, dtype=float)
    nx = pe.size - 1
    if f.ndim != 2 or f.shape[1] != nx:
        raise ParameterError(f"flux must have shape (n_exposures, {nx}) to match "
                             f"pixel_edges_um; got {f.shape}")
    if v.shape != f.shape:
        raise ParameterError(f"variance must have the shape of flux {f.shape}; got {v.shape}")
    m = np.asarray(mask)
    if m.dtype != bool:
        raise ParameterError(f"mask must be boolean (True = bad); got dtype {m.dtype}")
    try:
        m = np.broadcast_to(m, f.shape)
    except ValueError:
        raise ParameterError(f"mask must have shape {f.shape} or ({nx},); got {m.shape}") from None
    ce = _increasing(channel_edges, "channel_edges")
    p_min, p_max = min(pe[0], pe[-1]), max(pe[0], pe[-1])
    if ce[0] < p_min or ce[-1] > p_max:
        raise ParameterError(f"channel_edges must lie within the pixels' range "
                             f"[{p_min:g}, {p_max:g}] um; got [{ce[0]:g}, {ce[-1]:g}]")
    w = overlap_weights(pe, ce)

    bad = m | ~np.isfinite(f) | ~np.isfinite(v) | (v < 0)
    filled = np.zeros(f.shape, dtype=bool)
    f_use = np.where(bad, 0.0, f)
    v_use = np.where(bad, 0.0, v)
    if fill is not None:
        fl = np.broadcast_to(np.asarray(fill, dtype=float), f.shape)
        if fill_variance is None:
            fv = v
        else:
            fv = np.broadcast_to(np.asarray(fill_variance, dtype=float), f.shape)
        can_fill = bad & np.isfinite(fl) & np.isfinite(fv) & (fv >= 0)
        f_use = np.where(can_fill, fl, f_use)
        v_use = np.where(can_fill, fv, v_use)
        filled = can_fill
    unresolved = bad & ~filled

    touches = w > 0
    out_flux = f_use @ w
    out_var = v_use @ (w * w)
    out_mask = (unresolved.astype(float) @ touches.astype(float)) > 0
    n_filled = np.rint(filled.astype(float) @ touches.astype(float)).astype(int)
    if np.all(out_mask):
        raise AllMaskedError("every channel-exposure has an unfilled bad pixel; "
                             "give fill= or check mask")
    out_flux[out_mask] = np.nan
    out_var[out_mask] = np.nan
    return BinnedSpectra(flux=out_flux, variance=out_var, mask=out_mask,
                         n_filled=n_filled, weights=w, channel_edges=ce)
