"""Which part of a spectrum holds light, and how much light each channel holds.

A detector is usually wider than the instrument's band-pass: the ends of an
extracted spectrum hold read noise and background only.  Channels made
without explicit edges should cover the lit part alone (:func:`lit_range`),
and a channel that holds little light should say so (:func:`channel_light`).
Wavelengths are in micrometres, spectra in counts per pixel.
"""

from dataclasses import dataclass

import numpy as np

from .binning import _increasing, overlap_weights
from .errors import AllMaskedError, ParameterError

__all__ = ["LitRange", "lit_range", "channel_light"]


@dataclass(frozen=True)
class LitRange:
    """The part of a spectrum that holds light.

    Attributes
    ----------
    lo, hi : float
        Wavelength range in um: the outer edges of the first and last lit
        pixels.
    peak : float
        Peak of the smoothed spectrum, per pixel (the reference level).
    lit : ndarray of bool, shape (nx,)
        True for each pixel whose smoothed spectrum reaches the threshold.
    threshold : float
        The fraction of ``peak`` used.
    """

    lo: float
    hi: float
    peak: float
    lit: np.ndarray
    threshold: float


def _smoothed(spectrum, window=5):
    """Running median over ``window`` pixels, NaN-aware (shrinking windows at the ends)."""
    s = np.asarray(spectrum, dtype=float)
    half = window // 2
    padded = np.pad(s, half, mode="constant", constant_values=np.nan)
    windows = np.lib.stride_tricks.sliding_window_view(padded, window)
    finite = np.isfinite(windows)
    # NaN-aware median without warnings: sort with NaN last, take the middle finite value
    count = finite.sum(axis=1)
    ordered = np.sort(np.where(finite, windows, np.inf), axis=1)
    lo_i = np.clip((count - 1) // 2, 0, window - 1)
    hi_i = np.clip(count // 2, 0, window - 1)
    rows = np.arange(s.size)
    med = 0.5 * (ordered[rows, lo_i] + ordered[rows, hi_i])
    return np.where(count > 0, med, np.nan)


def lit_range(pixel_edges_um, spectrum, threshold=0.05):
    """Wavelength range of the part of a spectrum that holds light.

    A pixel is lit when the spectrum, smoothed by a 5-pixel running median
    (so that a single hot or dead pixel or a narrow line does not decide),
    reaches ``threshold`` times the smoothed spectrum's peak.  The lit range
    runs from the first lit pixel to the last; unlit pixels between them
    (deep absorption bands) stay inside.  Non-finite values count as missing.
    Inputs are not modified.

    Parameters
    ----------
    pixel_edges_um : array_like of float, shape (nx + 1,)
        Pixel edges in um, strictly increasing.
    spectrum : array_like of float, shape (nx,)
        Counts per pixel, e.g. the median spectrum of a visit.
    threshold : float
        Fraction of the peak, in [0, 1); 0 takes every pixel.

    Returns
    -------
    LitRange

    Raises
    ------
    AllMaskedError
        When the spectrum has no positive finite value.

    Notes
    -----
    A threshold of a few per cent of the peak keeps the band-pass edges,
    where a channel still has useful signal, and drops the unlit ends of the
    detector, whose channels hold only read noise and background (common
    practice).
    """
    pe = _increasing(pixel_edges_um, "pixel_edges_um")
    spec = np.asarray(spectrum, dtype=float)
    if spec.shape != (pe.size - 1,):
        raise ParameterError(f"spectrum must have shape ({pe.size - 1},) to match "
                             f"pixel_edges_um; got {spec.shape}")
    threshold = float(threshold)
    if not 0 <= threshold < 1:
        raise ParameterError(f"threshold must be in [0, 1); got {threshold}")
    smooth = _smoothed(spec)
    finite = np.isfinite(smooth)
    peak = float(np.max(smooth[finite])) if finite.any() else np.nan
    if not peak > 0:
        raise AllMaskedError("spectrum has no positive finite counts")
    if threshold == 0:
        lit = np.ones(spec.size, dtype=bool)
    else:
        lit = finite & (smooth >= threshold * peak)
    index = np.flatnonzero(lit)
    return LitRange(lo=float(pe[index[0]]), hi=float(pe[index[-1] + 1]), peak=peak,
                    lit=lit, threshold=threshold)


def channel_light(pixel_edges_um, spectrum, channel_edges, peak):
    """Mean counts per pixel of each channel, as a fraction of a peak level.

    The spectrum is first smoothed by the 5-pixel running median of
    :func:`lit_range`, so that a hot pixel cannot make a dark channel look
    lit.  Inputs are not modified.

    Parameters
    ----------
    pixel_edges_um : array_like of float, shape (nx + 1,)
        Pixel edges in um, strictly monotonic.
    spectrum : array_like of float, shape (nx,)
        Counts per pixel; non-finite values count as missing.
    channel_edges : array_like of float, shape (n_channels + 1,)
        Channel edges in um, strictly increasing.
    peak : float
        Reference counts per pixel (:attr:`LitRange.peak`), > 0.

    Returns
    -------
    fraction : ndarray of float, shape (n_channels,)
        ``sum_i w_ij s_i / sum_i w_ij / peak`` with ``s_i`` the smoothed
        spectrum and ``w_ij`` the fraction of pixel i inside channel j (:func:`overlap_weights`); 0 for a channel
        that holds no finite pixel.
    """
    spec = _smoothed(spectrum)
    w = overlap_weights(pixel_edges_um, channel_edges)
    ok = np.isfinite(spec)
    w = np.where(ok[:, None], w, 0.0)
    total = w.sum(axis=0)
    mean = (np.where(ok, spec, 0.0) @ w) / np.where(total > 0, total, 1.0)
    return np.where(total > 0, mean / float(peak), 0.0)
