"""Detector of the forward model: reference files, charge, noise and reads.

Conventions follow the raw layout (version 1): a read in ADU is
bias + nonlinear(e_linear) / gain + read noise / gain, where e_linear is the
accumulated charge in electrons (dark, sky, source, cosmic rays) and the
non-linearity cube C obeys linear = e (1 + sum_k C[k-1] e^k) with e the
charge as read; the generator applies the numerical inverse (Newton).
Charge above the hard full well is clipped (the pixel saturates).
"""

from dataclasses import dataclass

import numpy as np

from lightledger.pipeline.errors import ParameterError

__all__ = ["ReferenceFiles", "make_reference_files", "linearize", "apply_nonlinearity",
           "poisson_ramp", "one_over_f_noise", "CosmicRays", "draw_cosmic_rays",
           "digitise"]


@dataclass(frozen=True)
class ReferenceFiles:
    """Full-detector calibration arrays of a scenario.

    Attributes
    ----------
    bias : ndarray (n_rows, n_columns), ADU
    dark : ndarray (n_rows, n_columns), e-/s
    flat : ndarray (n_rows, n_columns) mean 1, or (K, n_rows, n_columns)
        polynomial coefficients in normalised wavelength.
    nonlinearity : ndarray (K, n_rows, n_columns)
        Coefficients C of linear = e (1 + sum_k C[k-1] e^k), e in electrons.
    bad_pixels : ndarray (n_rows, n_columns) of int16, nonzero = unusable
        1 = dead (no response), 2 = hot (high dark current).
    """

    bias: np.ndarray
    dark: np.ndarray
    flat: np.ndarray
    nonlinearity: np.ndarray
    bad_pixels: np.ndarray


def make_reference_files(rng, *, full_shape, bias_level, dark_rate, flat_kind,
                         nonlin_c1, nonlin_c2, n_dead, n_hot, hot_rate_range,
                         protect=None):
    """Draw the calibration arrays of one fictional detector.

    Parameters
    ----------
    rng : numpy.random.Generator
    full_shape : tuple of int
        (n_rows, n_columns) of the full detector.
    bias_level : float
        Mean reset level, ADU.
    dark_rate : float
        Mean dark current of normal pixels, e-/s.
    flat_kind : {"2d", "cube"}
        A 2-D flat of mean 1, or a 3-plane cube of polynomial coefficients in
        normalised wavelength (plane 0 mean 1, planes 1-2 mean 0).
    nonlin_c1, nonlin_c2 : float
        Mean first and second non-linearity coefficients (1/e, 1/e^2).
    n_dead, n_hot : int
        Number of dead and hot pixels (listed in the bad-pixel map).
    hot_rate_range : tuple of float
        Dark current range of hot pixels, e-/s (log-uniform).
    protect : tuple of slice, optional
        Region (rows, columns) kept free of dead pixels (for example the
        brightest science pixels), so that the scan stays mostly usable.

    Returns
    -------
    ReferenceFiles
    """
    if flat_kind not in ("2d", "cube"):
        raise ParameterError("flat_kind must be '2d' or 'cube'")
    ny, nx = full_shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    bias = (bias_level + 40.0 * np.sin(2 * np.pi * xx / 64.0) + 0.02 * yy
            + rng.normal(0.0, 15.0, full_shape))
    dark = np.clip(rng.normal(dark_rate, 0.2 * dark_rate, full_shape), 0.0, None)
    large = 1.0 + 0.01 * np.cos(np.pi * xx / nx) * np.cos(np.pi * yy / ny)
    f0 = large * (1.0 + rng.normal(0.0, 0.01, full_shape))
    f0 /= f0.mean()
    if flat_kind == "cube":
        f1 = rng.normal(0.0, 0.006, full_shape) + 0.01 * (xx / nx - 0.5)
        f2 = rng.normal(0.0, 0.003, full_shape)
        flat = np.stack([f0, f1 - f1.mean(), f2 - f2.mean()])
    else:
        flat = f0
    c1 = nonlin_c1 * (1.0 + rng.normal(0.0, 0.05, full_shape))
    c2 = nonlin_c2 * (1.0 + rng.normal(0.0, 0.05, full_shape))
    nonlin = np.stack([c1, c2])

    bad = np.zeros(full_shape, dtype=np.int16)
    allowed = np.ones(full_shape, dtype=bool)
    if protect is not None:
        allowed[protect] = False
    flat_idx = rng.permutation(ny * nx)
    dead = flat_idx[allowed.ravel()[flat_idx]][:n_dead]
    hot = flat_idx[~np.isin(flat_idx, dead)][:n_hot]
    bad.ravel()[dead] = 1
    bad.ravel()[hot] = 2
    if flat.ndim == 3:
        flat[0].ravel()[dead] = 0.02
        flat[1].ravel()[dead] = 0.0
        flat[2].ravel()[dead] = 0.0
    else:
        flat.ravel()[dead] = 0.02
    lo, hi = np.log(hot_rate_range[0]), np.log(hot_rate_range[1])
    dark.ravel()[hot] = np.exp(rng.uniform(lo, hi, hot.size))
    return ReferenceFiles(bias=bias.astype(np.float32), dark=dark.astype(np.float32),
                          flat=flat.astype(np.float32), nonlinearity=nonlin.astype(np.float32),
                          bad_pixels=bad)


def linearize(e_read, coefficients):
    """Linear charge of a charge as read: e (1 + sum_k C[k-1] e^k).

    Parameters
    ----------
    e_read : array_like of float
        Charge as read, electrons above bias; shape (..., n_rows, n_columns).
    coefficients : array_like of float
        Cube C of shape (K, n_rows, n_columns) (or broadcastable).

    Returns
    -------
    ndarray of float
        Linear charge, electrons; same shape as ``e_read``.
    """
    e = np.asarray(e_read, dtype=float)
    c = np.asarray(coefficients, dtype=float)
    poly = np.zeros(np.broadcast_shapes(e.shape, c.shape[1:]))
    for k in range(c.shape[0] - 1, -1, -1):       # Horner over K planes (not pixels)
        poly = (poly + c[k]) * e
    return e * (1.0 + poly)


def apply_nonlinearity(linear, coefficients, *, tol=1e-12, max_iter=30):
    """Charge as read for a linear charge: numerical inverse of :func:`linearize`.

    Parameters
    ----------
    linear : array_like of float
        Linear (true) charge, electrons above bias, >= 0.
    coefficients : array_like of float
        Non-linearity cube C (K, n_rows, n_columns), see :func:`linearize`.
    tol : float, optional
        Relative convergence tolerance of Newton's iteration.
    max_iter : int, optional
        Most iterations.

    Returns
    -------
    ndarray of float
        e with linearize(e) = linear to ``tol`` (relative).

    Notes
    -----
    Newton's method on g(e) = e (1 + sum C_k e^k) - L with
    g'(e) = 1 + sum (k + 1) C_k e^k, started at e = L / (1 + sum C_k L^k),
    converges in a few steps for the few-per-cent non-linearity of the demos.
    """
    lin = np.asarray(linear, dtype=float)
    c = np.asarray(coefficients, dtype=float)
    K = c.shape[0]
    e = lin / (1.0 + sum(c[k] * lin ** (k + 1) for k in range(K)))
    for _ in range(max_iter):
        g = linearize(e, c) - lin
        dg = 1.0 + sum((k + 2) * c[k] * e ** (k + 1) for k in range(K))
        step = g / dg
        e = e - step
        if np.all(np.abs(step) <= tol * np.maximum(np.abs(e), 1.0)):
            break
    return e


def poisson_ramp(expected, *, rng):
    """Cumulative charge of a ramp with Poisson increments.

    Parameters
    ----------
    expected : array_like of float
        Expected cumulative charge at each read, electrons, shape
        (n_reads, ...) with expected[0] the charge at the zero read
        (normally 0) and non-decreasing along axis 0.
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of float
        Cumulative charge, same shape: each increment between consecutive
        reads is an independent Poisson draw of its expectation.
    """
    expected = np.asarray(expected, dtype=float)
    steps = np.diff(expected, axis=0, prepend=0.0)
    return np.cumsum(rng.poisson(np.clip(steps, 0.0, None)).astype(float), axis=0)


def one_over_f_noise(rng, n_reads, n_rows, n_columns, *, row_sigma, column_sigma):
    """Correlated read noise: 1/f streams along the readout, electrons.

    The pixels of a read are clocked out row after row, columns fastest; a
    1/f (pink) series along that stream makes stripes along the rows that
    differ from read to read.  A second 1/f series along the columns, the
    same for every row of a read, makes column stripes.

    Parameters
    ----------
    rng : numpy.random.Generator
    n_reads, n_rows, n_columns : int
    row_sigma, column_sigma : float
        Standard deviation of each component, electrons.

    Returns
    -------
    ndarray of float, shape (n_reads, n_rows, n_columns)
    """
    def pink(n_series, length, sigma):
        if sigma <= 0:
            return np.zeros((n_series, length))
        freq = np.fft.rfftfreq(length)
        amp = np.zeros_like(freq)
        amp[1:] = freq[1:] ** -0.5
        spec = amp * (rng.normal(size=(n_series, freq.size)) + 1j * rng.normal(size=(n_series, freq.size)))
        series = np.fft.irfft(spec, n=length, axis=1)
        series /= series.std(axis=1, keepdims=True)
        return sigma * series

    rows = pink(n_reads, n_rows * n_columns, row_sigma).reshape(n_reads, n_rows, n_columns)
    cols = pink(n_reads, n_columns, column_sigma)[:, None, :]
    return rows + cols


@dataclass(frozen=True)
class CosmicRays:
    """Cosmic-ray hits of a run of exposures.

    Attributes
    ----------
    exposure : ndarray of int
        Exposure index within the visit.
    read : ndarray of int
        First read (>= 1) that contains the charge; it arrived between reads
        ``read - 1`` and ``read``.
    y, x : ndarray of int
        Subarray pixel (row, column).
    electrons : ndarray of float
        Deposited charge, electrons.
    """

    exposure: np.ndarray
    read: np.ndarray
    y: np.ndarray
    x: np.ndarray
    electrons: np.ndarray


def draw_cosmic_rays(rng, *, n_exposures, n_reads, shape, hits_per_exposure,
                     median_electrons, first_exposure=0):
    """Poisson number of single-pixel hits per exposure with log-normal charge.

    Parameters
    ----------
    rng : numpy.random.Generator
    n_exposures, n_reads : int
    shape : tuple of int
        Subarray (n_rows, n_columns).
    hits_per_exposure : float
        Mean number of hits per exposure.
    median_electrons : float
        Median deposited charge (log-normal, sigma of ln = 0.8), electrons.
    first_exposure : int, optional
        Index of the first exposure (for the table of the whole visit).

    Returns
    -------
    CosmicRays
    """
    counts = rng.poisson(hits_per_exposure, n_exposures)
    total = int(counts.sum())
    exposure = np.repeat(np.arange(n_exposures), counts) + first_exposure
    read = rng.integers(1, n_reads, total)
    y = rng.integers(0, shape[0], total)
    x = rng.integers(0, shape[1], total)
    electrons = np.minimum(median_electrons * np.exp(rng.normal(0.0, 0.8, total)), 6e4)
    return CosmicRays(exposure, read, y, x, electrons)


def digitise(linear_charge, *, bias, nonlinearity, gain, full_well, read_noise_e):
    """Reads in ADU from cumulative linear charge and read noise.

    Parameters
    ----------
    linear_charge : ndarray of float, shape (..., n_reads, n_rows, n_columns)
        Accumulated charge in electrons (already with Poisson noise).
    bias : ndarray (n_rows, n_columns), ADU
    nonlinearity : ndarray (K, n_rows, n_columns)
    gain : float
        Electrons per ADU.
    full_well : float
        Hard saturation of the charge as read, electrons.
    read_noise_e : ndarray or float
        Read noise to add to each read, electrons (same shape as the charge,
        or 0).

    Returns
    -------
    ndarray of float32
        bias + min(nonlinear(charge), full_well) / gain + read_noise_e / gain.
    """
    e = apply_nonlinearity(linear_charge, nonlinearity)
    e = np.minimum(e, full_well)
    return (bias + (e + read_noise_e) / gain).astype(np.float32)
