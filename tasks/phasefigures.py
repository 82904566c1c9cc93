"""Figures of a phase-curve fit (PNG, written through :func:`products.save_figure`).

``phasecurve.png``
    The white band against orbital phase: detrended flux with the model
    (transit, eclipses), the planet's flux in ppm (binned points and model),
    and residuals; transit and eclipses marked.
``phasecurve-channels.png``
    The same planet flux and residuals for every channel.
``phasespectra.png``
    Phase-resolved spectra and the day-side and night-side spectra.
``residuals.png``
    Each visit's white residuals against time.
"""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from lightledger.pipeline.orbit import eclipse_time  # noqa: E402
from lightledger.pipeline.phasecurve import event_shapes, planet_flux  # noqa: E402

from .products import save_figure  # noqa: E402

__all__ = ["phase_figures"]

_N_FINE = 60   # bins across the orbit for the binned points


def _binned(phase, y, err, ok, n=_N_FINE):
    edges = np.linspace(0.0, 1.0, n + 1)
    idx = np.clip(np.searchsorted(edges, phase, side="right") - 1, 0, n - 1)
    mid, mean, sig = [], [], []
    for b in range(n):              # loop over bins only
        sel = ok & (idx == b) & np.isfinite(y) & (err > 0)
        if np.count_nonzero(sel) < 2:
            continue
        w = 1.0 / err[sel] ** 2
        mid.append(np.mean(phase[sel]))
        mean.append(np.sum(w * y[sel]) / np.sum(w))
        sig.append(1.0 / np.sqrt(np.sum(w)))
    return np.array(mid), np.array(mean), np.array(sig)


def _model_curve(jf, eph, u1, u2):
    """Model over one orbit from mid-transit: (phase, E, planet visible flux)."""
    phase = np.linspace(0.0, 1.0, 2001)
    t = eph.t0 + phase * eph.period
    sh = event_shapes(t, eph, jf.rp_rs, u1, u2)
    fp = planet_flux(jf.planet, sh.angle) * sh.visible
    return phase, 1.0 - sh.blocked + fp, fp


def _mark_events(ax, eph):
    ecl = np.mod((eclipse_time(eph) - eph.t0) / eph.period, 1.0)
    for x, what in ((0.0, "transit"), (1.0, None), (ecl, "eclipse")):
        ax.axvline(x, color="0.6", lw=0.8, ls="--", zorder=0)
        if what:
            ax.text(x, 1.0, f" {what}", transform=ax.get_xaxis_transform(), fontsize=7,
                    va="top", color="0.4")


def _planet_panel(ax, rax, jf, p, eph, u1, u2, title):
    ok = p.used & np.isfinite(p.planet_flux)
    ax.plot(p.phase[ok], p.planet_flux[ok] * 1e6, ".", ms=2, color="0.75")
    m, y, s = _binned(p.phase, p.planet_flux, p.planet_error, ok)
    ax.errorbar(m, y * 1e6, s * 1e6, fmt="o", ms=3, color="tab:blue", lw=0.8)
    ph, _, fp = _model_curve(jf, eph, u1, u2)
    ax.plot(ph, fp * 1e6, color="tab:red", lw=1.2)
    lo, hi = np.nanpercentile(p.planet_flux[ok] * 1e6, [1, 99]) if ok.any() else (0, 1)
    pad = 0.2 * (hi - lo + 1)
    ax.set_ylim(lo - pad, hi + pad)
    ax.set_xlim(0, 1)
    ax.set_title(title, fontsize=9)
    _mark_events(ax, eph)
    res = (p.planet_flux - p.model) * 1e6
    rax.plot(p.phase[ok], res[ok], ".", ms=2, color="0.75")
    m, y, s = _binned(p.phase, res / 1e6, p.planet_error, ok)
    rax.errorbar(m, y * 1e6, s * 1e6, fmt="o", ms=2.5, color="tab:blue", lw=0.8)
    rax.axhline(0, color="tab:red", lw=0.8)
    rax.set_xlim(0, 1)
    if ok.any():
        r = np.nanpercentile(np.abs(res[ok]), 99)
        rax.set_ylim(-1.3 * r, 1.3 * r)


def phase_figures(folder, fit, points, bins, planet_tab, daynight, times, planet, names):
    """Draw the four phase-curve figures into ``folder``; returns their paths.

    ``points`` are the white band's and each channel's
    :class:`~lightledger.pipeline.programme.PlanetPoints`, ``bins`` the
    :class:`~lightledger.pipeline.programme.PhaseBins`, ``planet`` the
    :class:`~lightledger.pipeline.jointfit.PlanetModel`.
    """
    figs = []
    eph, u1, u2 = planet.ephemeris, planet.u1, planet.u2
    white, pw = fit.white, points[0]

    # 1. white band
    fig = plt.figure(figsize=(10, 8), constrained_layout=True)
    gs = fig.add_gridspec(3, 1, height_ratios=[2, 2, 1])
    ax0, ax1, ax2 = (fig.add_subplot(gs[i]) for i in range(3))
    vis_det = np.concatenate([v.detrended for v in white.visits])
    ok = pw.used & np.isfinite(vis_det)
    colours = plt.get_cmap("tab10")
    for k in np.unique(pw.visit):
        sel = ok & (pw.visit == k)
        ax0.plot(pw.phase[sel], vis_det[sel], ".", ms=3, color=colours(int(k) % 10),
                 label=names[int(k)] if len(names) > 1 else None)
    ph, E, _ = _model_curve(white, eph, u1, u2)
    ax0.plot(ph, E, color="tab:red", lw=1.0, label="model")
    ax0.set_xlim(0, 1)
    ax0.set_ylabel("flux / systematics (star alone = 1)")
    ax0.set_title("white band: detrended light curve against orbital phase", fontsize=10)
    ax0.legend(fontsize=7, loc="lower right")
    _mark_events(ax0, eph)
    _planet_panel(ax1, ax2, white, pw, eph, u1, u2, "planet flux over the star's (ppm)")
    ax1.set_ylabel("planet / star (ppm)")
    ax2.set_ylabel("residual (ppm)")
    ax2.set_xlabel("orbital phase (cycles from mid-transit)")
    path = folder / "phasecurve.png"
    save_figure(fig, path)
    figs.append(path)

    # 2. every channel
    n = len(fit.channels)
    cols = 2
    rows = int(np.ceil(n / cols))
    fig = plt.figure(figsize=(11, 2.6 * rows + 0.6), constrained_layout=True)
    outer = fig.add_gridspec(rows, cols)
    for j, jf in enumerate(fit.channels):
        inner = outer[j // cols, j % cols].subgridspec(2, 1, height_ratios=[2.2, 1], hspace=0)
        ax, rax = fig.add_subplot(inner[0]), fig.add_subplot(inner[1])
        row = planet_tab[j + 1]
        _planet_panel(ax, rax, jf, points[j + 1], eph, u1, u2,
                      f"channel {j}: {row['wave_lo']:.3f}-{row['wave_hi']:.3f} um (ppm)")
        ax.tick_params(labelbottom=False, labelsize=7)
        rax.tick_params(labelsize=7)
    fig.suptitle("planet flux over the star's per channel (binned points, model, residuals) "
                 "against orbital phase", fontsize=10)
    path = folder / "phasecurve-channels.png"
    save_figure(fig, path)
    figs.append(path)

    # 3. phase-resolved, day-side and night-side spectra
    fig, (a, b) = plt.subplots(1, 2, figsize=(11, 4.5), constrained_layout=True)
    wave = np.asarray(daynight["wave_mid"], float)
    cmap = plt.get_cmap("twilight")
    for i in range(bins.lo.size):
        f = bins.flux[i, 1:]
        if np.all(~np.isfinite(f)):
            continue
        a.errorbar(wave, f * 1e6, bins.error[i, 1:] * 1e6, fmt="o-", ms=3, lw=0.8,
                   color=cmap(bins.mid[i]), label=f"{bins.lo[i]:.2f}-{bins.hi[i]:.2f}")
    a.set_xlabel("wavelength (um)")
    a.set_ylabel("planet / star (ppm)")
    a.set_title("phase-resolved spectrum (orbital phase bins)", fontsize=10)
    a.legend(fontsize=6, ncol=2)
    for name, colour in (("day", "tab:red"), ("night", "tab:blue")):
        b.errorbar(wave, np.asarray(daynight[f"{name}_flux"], float) * 1e6,
                   np.asarray(daynight[f"{name}_error"], float) * 1e6, fmt="o-", ms=4,
                   color=colour, label=f"{name} side")
    b.set_xlabel("wavelength (um)")
    b.set_ylabel("planet / star (ppm)")
    b.set_title("day side (mid-eclipse) and night side (mid-transit)", fontsize=10)
    b.legend(fontsize=8)
    path = folder / "phasespectra.png"
    save_figure(fig, path)
    figs.append(path)

    # 4. per-visit residuals against time
    nv = len(white.visits)
    fig, axes = plt.subplots(nv, 1, figsize=(10, 2.4 * nv + 0.5), squeeze=False,
                             constrained_layout=True)
    for k, (vf, t) in enumerate(zip(white.visits, times)):
        ax = axes[k, 0]
        used = ~vf.fit_mask
        hours = (np.asarray(t) - t[0]) * 24.0
        ax.plot(hours[used], vf.residuals[used] * 1e6, ".", ms=3, color="tab:blue")
        ax.plot(hours[~used], vf.residuals[~used] * 1e6, "x", ms=3, color="0.6",
                label="left out of the fit")
        ax.axhline(0, color="tab:red", lw=0.8)
        rms = np.sqrt(np.nanmean(vf.residuals[used] ** 2)) * 1e6 if used.any() else np.nan
        ax.set_title(f"{names[k]}: white residuals, rms {rms:.0f} ppm", fontsize=9)
        ax.set_ylabel("ppm")
        if (~used).any():
            ax.legend(fontsize=7)
    axes[-1, 0].set_xlabel("hours since the visit's first exposure")
    path = folder / "residuals.png"
    save_figure(fig, path)
    figs.append(path)
    return figs
