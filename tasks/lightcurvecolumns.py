"""Column descriptions of the bin stage's tables, and the LIGHTCURVES table for ECSV readers.

The README's "Light-curve products" tables are written from these
dictionaries (name: (unit, description)).
"""

from astropy.table import Table

from .metadata import channel_text

__all__ = ["COLUMNS", "SET_ASIDE_COLUMNS", "CHANNEL_COLUMNS", "SPECTRUM_COLUMNS", "wide_table"]


# Column descriptions of LIGHTCURVES; the README's table is written from this.
COLUMNS = {
    "exposure": ("", "exposure number in start-time order"),
    "time_bjd_tdb": ("d", "mid-exposure time, BJD_TDB (barycentric JD, TDB scale)"),
    "time_mjd_utc": ("d", "same instant, MJD (JD - 2400000.5) in UTC at the observer"),
    "exposure_time": ("s", "exposure duration: zero read to last read"),
    "white_flux": ("electron", "white-band flux"),
    "white_error": ("electron", "1-sigma error of white_flux"),
    "white_mask": ("", "True where white_flux is unusable"),
    "flux": ("electron", "channel flux; vector over the CHANNELS rows"),
    "error": ("electron", "1-sigma error of flux; vector over the CHANNELS rows"),
    "mask": ("", "True where flux is unusable; vector over the CHANNELS rows"),
    "n_filled": ("", "pixels filled from the median spectrum; vector over CHANNELS"),
    "orbit": ("", "orbit number, 0 = first (one orbit for a stare), split at occultation gaps"),
    "orbit_time": ("d", "time since the orbit's first exposure started (orbit phase)"),
    "visit_time": ("d", "time since the visit's first exposure started"),
    "scan_direction": ("", "+1 forward scan, -1 reverse scan, 0 staring"),
    "dx": ("pix", "spectrum shift along the dispersion relative to the reference"),
    "dy": ("pix", "spatial shift of the trace or scanned band"),
    "width": ("pix", "spatial width of the trace (Gaussian sigma) or scanned band length"),
    "background": ("electron", "median sky background per pixel"),
    "first_orbit": ("", "True in the visit's first orbit"),
    "first_in_orbit": ("", "True for an orbit's first exposure"),
    "flux_outlier": ("", "True where the white flux departs from its running median"),
}

# Columns that say where each exposure came from and whether it was set aside at input.
SET_ASIDE_COLUMNS = {
    "file": ("", "raw file holding the exposure"),
    "file_index": ("", "exposure's index in its file's READS; -1: one exposure per file"),
    "set_aside": ("", "True: exposure set aside at input (NaN fluxes, masks True)"),
    "reason": ("", "why the exposure was set aside; empty when it was reduced"),
}


# Column descriptions of CHANNELS and SPECTRUM.
CHANNEL_COLUMNS = {
    "channel": ("", "channel number: element of the LIGHTCURVES vectors, NN of flux_NN"),
    "wave_lo": ("um", "lower wavelength edge of the channel"),
    "wave_hi": ("um", "upper wavelength edge of the channel"),
    "wave_mid": ("um", "centre of the channel, (wave_lo + wave_hi) / 2"),
    "n_pixels": ("pix", "spectral pixels in the channel, weighted by their overlap"),
    "mean_counts": ("electron", "mean channel flux over the exposures"),
    "light": ("", "mean light per pixel / peak of the median spectrum"),
    "dim": ("", "True where light < LITTHR: the channel holds little light"),
}
SPECTRUM_COLUMNS = {
    "wave_lo": ("um", "lower wavelength edge of the pixel"),
    "wave_hi": ("um", "upper wavelength edge of the pixel"),
    "flux": ("electron", "median of the aligned spectra, per pixel"),
    "error": ("electron", "1-sigma error of flux: median error / sqrt(exposures)"),
}


def wide_table(lc, n_channels, channels=None):
    """The LIGHTCURVES table with one column per channel (for ECSV readers).

    With ``channels`` (the CHANNELS table) each channel column's description
    ends with the channel's wavelength range.
    """
    out = Table()
    for name in lc.colnames:
        col = lc[name]
        if col.ndim == 2:
            base = (col.description or name).split("; vector over")[0]
            for j in range(n_channels):
                where = channel_text(channels, j) if channels is not None else f"channel {j}"
                out[f"{name}_{j:02d}"] = col[:, j]
                out[f"{name}_{j:02d}"].unit = col.unit
                out[f"{name}_{j:02d}"].description = f"{base}, {where}"
        else:
            out[name] = col
    return out
