"""Tests of lightledger.pipeline.transit.

References: Mandel & Agol 2002 (ApJ 580, L171) for the model; batman
(Kreidberg 2015, PASP 127, 1161) is the reference library; scipy's adaptive
quadrature of the defining integral is an independent second reference.
"""

import numpy as np
import pytest
from scipy import integrate

batman = pytest.importorskip("batman")

from lightledger.pipeline import transit as tr
from lightledger.pipeline.errors import ParameterError

PERIOD = 3.0
A_RS = 8.0
LD_PAIRS = [(0.0, 0.0), (0.3, 0.2), (0.1, 0.45), (0.6, -0.1), (1.0, 0.0)]


def _batman(t, *, rp, inc, u, kind="primary", fp=None):
    pm = batman.TransitParams()
    pm.t0, pm.per, pm.rp, pm.a, pm.inc = 0.0, PERIOD, rp, A_RS, inc
    pm.ecc, pm.w = 0.0, 90.0
    pm.u, pm.limb_dark = (list(u), "quadratic") if u is not None else ([], "uniform")
    if kind == "secondary":
        pm.fp, pm.t_secondary = fp, 0.5 * PERIOD
        return batman.TransitModel(pm, t, transittype="secondary").light_curve(pm)
    return batman.TransitModel(pm, t).light_curve(pm)


def _contact_times(z_values, inc):
    """Times (days from t0, both sides) at which the separation equals each z."""
    cos_i = np.cos(np.deg2rad(inc))
    out = []
    for z in z_values:
        s2 = ((z / A_RS) ** 2 - cos_i ** 2) / (1 - cos_i ** 2)
        if 0.0 <= s2 <= 1.0:
            phi = np.arcsin(np.sqrt(s2)) / (2 * np.pi) * PERIOD
            out += [phi, -phi]
    return np.array(out)


def _reference_blocked(z, p, u1, u2):
    """Defining integral of the blocked flux (Mandel & Agol 2002, section 3) by scipy quad."""
    def inten(r):
        mu = np.sqrt(max(1 - r * r, 0.0))
        return 1 - u1 * (1 - mu) - u2 * (1 - mu) ** 2

    def kappa(r):
        if r <= p - z:
            return np.pi
        if r <= z - p or r >= z + p:
            return 0.0
        return np.arccos(np.clip((r * r + z * z - p * p) / (2 * r * z), -1, 1))

    pts = [x for x in (abs(z - p), z + p) if 0 < x < 1]
    val, _ = integrate.quad(lambda r: inten(r) * 2 * r * kappa(r), 0, 1, points=pts or None,
                            limit=400, epsabs=1e-13, epsrel=1e-12)
    return val / (np.pi * (1 - u1 / 3 - u2 / 6))


@pytest.mark.parametrize("rp", [0.01, 0.05, 0.1, 0.2, 0.3])
def test_transit_matches_batman(rp):
    # batman (Kreidberg 2015) within 1 ppm, impact parameters 0..1.1, several
    # limb-darkening pairs, including the contact points z = 1 - p and 1 + p.
    # batman's elliptic integral of the third kind fails to converge exactly at
    # z = p, so that point is checked against quadrature below instead.
    worst = 0.0
    for b in (0.0, 0.3, 0.6, 0.85, 0.95, 1.0, 1.05, 1.1):
        inc = np.degrees(np.arccos(b / A_RS))
        t = np.concatenate([np.linspace(-0.13, 0.13, 401), _contact_times([1 + rp, 1 - rp], inc)])
        for u1, u2 in LD_PAIRS:
            ours = tr.transit_flux(t, t0=0.0, period=PERIOD, rp_rs=rp, a_rs=A_RS,
                                   inclination=inc, u1=u1, u2=u2)
            ref = _batman(t, rp=rp, inc=inc, u=(u1, u2))
            worst = max(worst, np.max(np.abs(ours - ref)))
    assert worst < 1e-6, worst


@pytest.mark.parametrize("p", [0.01, 0.1, 0.3, 0.7])
@pytest.mark.parametrize("zf", ["0", "p", "1-p", "1+p", "mid", "near1-p"])
def test_blocked_fraction_matches_quadrature(p, zf):
    # Independent check of the kernel at the special separations against scipy's
    # adaptive quadrature of the defining integral (tolerance 1e-9).
    z = {"0": 0.0, "p": p, "1-p": 1 - p, "1+p": 1 + p, "mid": 0.5 * (1 + p) + 0.1 * p,
         "near1-p": 1 - p + 1e-7}[zf]
    for u1, u2 in LD_PAIRS:
        ours = tr.limb_darkened_blocked_fraction(z, p, u1, u2)
        assert np.isfinite(ours)
        assert abs(ours - _reference_blocked(z, p, u1, u2)) < 1e-9


def test_uniform_limit_is_area_ratio():
    # With no limb darkening the blocked flux is overlap / pi = p^2 * occulted fraction
    # (Mandel & Agol 2002, eq. 1), and batman's uniform model agrees.
    z = np.linspace(0, 1.4, 301)
    for p in (0.05, 0.2, 0.4):
        a = tr.limb_darkened_blocked_fraction(z, p, 0.0, 0.0)
        # 1e-10: the closed-form lens area loses digits near tangency (arccos near 1).
        np.testing.assert_allclose(a, p * p * tr.occulted_fraction_uniform(z, p), atol=1e-10)
    t = np.linspace(-0.12, 0.12, 301)
    ours = tr.transit_flux(t, t0=0, period=PERIOD, rp_rs=0.15, a_rs=A_RS, inclination=88.5,
                           u1=0, u2=0)
    assert np.max(np.abs(ours - _batman(t, rp=0.15, inc=88.5, u=None))) < 1e-6


def test_occulted_fraction_edge_cases():
    # Geometry of two disks (exact values, no source needed beyond the definitions).
    p = np.array([0.1, 0.1, 0.1, 0.1, 1.5, 1.5, 0.0])
    z = np.array([0.0, 0.1, 0.9, 1.1, 0.0, 0.5, 0.3])
    f = tr.occulted_fraction_uniform(z, p)
    assert np.all(np.isfinite(f))
    np.testing.assert_allclose(f, [1, 1, 1, 0, 1 / 1.5 ** 2, 1 / 1.5 ** 2, 0], atol=1e-12)
    # Half-covered: a planet of any size centred on the limb of a much larger star
    # hides a bit less than half; check the lens formula against a pixel count.
    yy, xx = np.mgrid[-1.5:1.5:3001j, -1.5:1.5:3001j]
    for pp, zz in [(0.3, 0.95), (0.5, 0.7), (1.2, 0.9)]:
        inside = (xx ** 2 + yy ** 2 <= 1) & ((xx - zz) ** 2 + yy ** 2 <= pp ** 2)
        est = inside.sum() * (3 / 3000) ** 2 / (np.pi * pp ** 2)
        assert abs(tr.occulted_fraction_uniform(zz, pp) - est) < 2e-3   # grid error ~1e-3


def test_large_planet_and_contacts_no_nan():
    z = np.array([0.0, 0.2, 0.5, 0.8, 1.0, 1.5, 2.5, 2.6])
    for p in (0.2, 1.0, 1.5):
        zz = np.concatenate([z, [p, abs(1 - p), 1 + p]])
        f = tr.limb_darkened_blocked_fraction(zz, p, 0.4, 0.2)
        assert np.all(np.isfinite(f)) and np.all((f >= 0) & (f <= 1))
    # Full coverage by p > 1 blocks everything.
    assert tr.limb_darkened_blocked_fraction(0.2, 1.5, 0.4, 0.2) == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("b", [0.0, 0.5, 0.9, 1.05])
def test_eclipse_matches_batman(b):
    # batman's secondary eclipse (params.fp, params.t_secondary, transittype="secondary")
    # within 1 ppm, including points 1e-9 inside the contacts (batman returns NaN
    # exactly at z = 1 - p; ours is checked there in test_occulted_fraction_edge_cases).
    inc = np.degrees(np.arccos(b / A_RS))
    t = np.concatenate([np.linspace(-0.2, 1.7, 1501),
                        0.5 * PERIOD + _contact_times([1 + 0.12 - 1e-9, 1 - 0.12 + 1e-9], inc)])
    for fp in (1e-4, 2e-3):
        ours = tr.eclipse_flux(t, t0=0, period=PERIOD, rp_rs=0.12, a_rs=A_RS, inclination=inc,
                               fp_fs=fp)
        ref = _batman(t, rp=0.12, inc=inc, u=None, kind="secondary", fp=fp)
        assert np.max(np.abs(ours - ref)) < 1e-6


def test_no_eclipse_at_transit_and_no_transit_at_eclipse():
    t = np.linspace(-0.05, 0.05, 11)
    e = tr.eclipse_flux(t, t0=0, period=PERIOD, rp_rs=0.1, a_rs=A_RS, inclination=89, fp_fs=1e-3)
    np.testing.assert_array_equal(e, 1 + 1e-3)
    f = tr.transit_flux(t + 0.5 * PERIOD, t0=0, period=PERIOD, rp_rs=0.1, a_rs=A_RS,
                        inclination=89, u1=0.3, u2=0.2)
    np.testing.assert_array_equal(f, 1.0)


def test_separation_matches_batman_and_geometry():
    # batman's sky separation (TransitModel.ds, set to 100 behind the star) and
    # the circular-orbit geometry: z(t0) = a cos i, z(t0 + P/4) = a.
    t = np.linspace(-0.6, 2.6, 97)
    pm = batman.TransitParams()
    pm.t0, pm.per, pm.rp, pm.a, pm.inc, pm.ecc, pm.w = 0.0, PERIOD, 0.1, A_RS, 87.0, 0.0, 90.0
    pm.u, pm.limb_dark = [0.1, 0.2], "quadratic"
    ds = batman.TransitModel(pm, t).ds
    z = tr.projected_separation(t, t0=0.0, period=PERIOD, a_rs=A_RS, inclination=87.0)
    front = tr.planet_in_front(t, t0=0.0, period=PERIOD)
    np.testing.assert_allclose(z[front], ds[front], rtol=1e-9)
    assert np.all(ds[~front] == 100.0)
    z0 = tr.projected_separation(np.array([0.0, PERIOD / 4]), t0=0.0, period=PERIOD, a_rs=A_RS,
                                 inclination=87.0)
    np.testing.assert_allclose(z0, [A_RS * np.cos(np.deg2rad(87.0)), A_RS], rtol=1e-12)


def test_broadcasting_and_inputs_unchanged():
    t = np.linspace(-0.1, 0.1, 21)
    rp = np.array([0.1, 0.11, 0.12])
    t_copy, rp_copy = t.copy(), rp.copy()
    f = tr.transit_flux(t[:, None], t0=0, period=PERIOD, rp_rs=rp[None, :], a_rs=A_RS,
                        inclination=89, u1=0.3, u2=0.2)
    assert f.shape == (21, 3)
    for k in range(3):
        np.testing.assert_array_equal(
            f[:, k], tr.transit_flux(t, t0=0, period=PERIOD, rp_rs=rp[k], a_rs=A_RS,
                                     inclination=89, u1=0.3, u2=0.2))
    np.testing.assert_array_equal(t, t_copy)
    np.testing.assert_array_equal(rp, rp_copy)


@pytest.mark.parametrize("kwargs", [dict(period=0.0), dict(period=-1.0), dict(a_rs=0.0),
                                    dict(inclination=190.0), dict(rp_rs=-0.1)])
def test_bad_parameters_raise(kwargs):
    args = dict(t0=0.0, period=PERIOD, rp_rs=0.1, a_rs=A_RS, inclination=89.0, u1=0.3, u2=0.2)
    args.update(kwargs)
    with pytest.raises(ParameterError):
        tr.transit_flux(np.zeros(3), **args)
