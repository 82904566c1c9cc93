"""Spectra of the fictional scenarios: star, throughput, planet.

All wavelengths are in micrometres, temperatures in kelvin.  Constants come
from :mod:`astropy.constants` (CODATA).
"""

import numpy as np
from astropy import constants as const

__all__ = ["planck_lambda", "photon_rate_shape", "throughput", "stellar_lines",
           "radius_ratio_spectrum", "planet_star_flux_ratio", "H_LINES_UM"]

_H = const.h.si.value
_C = const.c.si.value
_K = const.k_B.si.value

#: Hydrogen absorption lines of the stellar spectrum in the bands (vacuum, um;
#: Paschen alpha, beta and gamma and Brackett lines; values from memory, to
#: 1e-4 um, which only matters for realism).
H_LINES_UM = (1.0941, 1.2822, 1.5265, 1.5561, 1.5885, 1.6114, 1.6412, 1.6811, 1.7367,
              1.8181, 1.8756, 1.9451, 2.1661)


def planck_lambda(wavelength, temperature):
    """Planck spectral radiance B_lambda.

    Parameters
    ----------
    wavelength : array_like of float
        Wavelength in um.
    temperature : float or array_like
        Temperature in K, > 0.

    Returns
    -------
    ndarray of float
        B_lambda in W m^-2 sr^-1 m^-1: 2 h c^2 / lambda^5 / (exp(h c / lambda k T) - 1).
    """
    lam = np.asarray(wavelength, dtype=float) * 1e-6
    x = _H * _C / (lam * _K * np.asarray(temperature, dtype=float))
    return 2.0 * _H * _C ** 2 / lam ** 5 / np.expm1(x)


def photon_rate_shape(wavelength, temperature):
    """Photon spectral radiance B_lambda * lambda / (h c), photons s^-1 m^-2 sr^-1 m^-1."""
    lam = np.asarray(wavelength, dtype=float) * 1e-6
    return planck_lambda(wavelength, temperature) * lam / (_H * _C)


def throughput(wavelength, *, lo, hi, edge, peak, tilt=0.0):
    """Smooth band-pass: product of two tanh edges, with a gentle linear tilt.

    Parameters
    ----------
    wavelength : array_like of float
        Wavelength in um.
    lo, hi : float
        Half-power wavelengths of the blue and red edges, um.
    edge : float
        Width of each edge, um.
    peak : float
        Throughput at the band centre (dimensionless).
    tilt : float, optional
        Fractional change of throughput per um about the band centre.

    Returns
    -------
    ndarray of float
        Dimensionless throughput, >= 0.
    """
    lam = np.asarray(wavelength, dtype=float)
    centre = 0.5 * (lo + hi)
    shape = 0.25 * (1 + np.tanh((lam - lo) / edge)) * (1 + np.tanh((hi - lam) / edge))
    return np.clip(peak * shape * (1.0 + tilt * (lam - centre)), 0.0, None)


def stellar_lines(wavelength, *, depth, width):
    """Multiplicative absorption of the lines in :data:`H_LINES_UM`.

    Parameters
    ----------
    wavelength : array_like of float
        Wavelength in um.
    depth : float
        Fractional central depth of each Gaussian line.
    width : float
        Gaussian sigma of each line, um.

    Returns
    -------
    ndarray of float
        Product of (1 - depth exp(-(lambda - line)^2 / 2 width^2)).
    """
    lam = np.asarray(wavelength, dtype=float)[..., None]
    lines = np.asarray(H_LINES_UM)
    return np.prod(1.0 - depth * np.exp(-0.5 * ((lam - lines) / width) ** 2), axis=-1)


def radius_ratio_spectrum(wavelength, *, rp_rs, band_centre, band_width, band_depth):
    """Planet-to-star radius ratio with one Gaussian molecular band.

    The transit depth is (rp/rs)^2 = rp_rs^2 + band_depth exp(-(lambda - c)^2 / 2 w^2).

    Parameters
    ----------
    wavelength : array_like of float
        Wavelength in um.
    rp_rs : float
        Continuum radius ratio.
    band_centre, band_width : float
        Centre and Gaussian sigma of the band, um.
    band_depth : float
        Extra transit depth at the band centre (e.g. 2e-4 for 200 ppm).

    Returns
    -------
    ndarray of float
        Radius ratio at each wavelength.
    """
    lam = np.asarray(wavelength, dtype=float)
    depth = rp_rs ** 2 + band_depth * np.exp(-0.5 * ((lam - band_centre) / band_width) ** 2)
    return np.sqrt(depth)


def planet_star_flux_ratio(wavelength, *, rp_rs, t_planet, t_star):
    """Dayside planet-to-star flux ratio of two blackbodies, (rp/rs)^2 B(Tp)/B(Ts).

    Parameters
    ----------
    wavelength : array_like of float
        Wavelength in um.
    rp_rs : float or array_like
        Radius ratio.
    t_planet, t_star : float
        Brightness temperatures, K.

    Returns
    -------
    ndarray of float
        fp/fs at each wavelength.
    """
    return np.asarray(rp_rs) ** 2 * planck_lambda(wavelength, t_planet) / planck_lambda(wavelength, t_star)
