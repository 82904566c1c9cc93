"""Tests of lightledger.pipeline.traps: the charge-trapping ramp of Zhou et al. 2017."""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.traps import TrapPopulation, trap_history, trap_ramp_basis


def test_worked_case_one_population():
    # Hand computation from the published equations (Zhou et al. 2017, AJ 153,
    # 243, eqs. 1-3): dE/dt = eta f (1 - E/E_tot) - E/tau while lit, E decays as
    # exp(-t/tau) in the dark, an orbit refill adds Delta E_orb.
    # E_tot = 100 e-, eta = 0.01, tau = 1000 s, f = 500 e-/s, t_exp = 100 s.
    #   c     = eta f / E_tot + 1/tau = 0.05 + 0.001 = 0.051 /s
    #   E_inf = eta f / c = 5 / 0.051 = 98.0392157 e-
    #   a     = exp(-c t_exp) = exp(-5.1) = 0.00609674657
    # exposure 0 (start 0 s, empty traps):  E_end = E_inf (1 - a) = 97.4414954
    # dark 20 s:                             E = 97.4414954 exp(-0.02) = 95.5120246
    # exposure 1 (start 120 s):              E_end = E_inf + (95.5120246 - E_inf) a = 98.0238080
    #                                        trapped = 2.5117835
    # dark 2780 s, new orbit, refill 10 e-:  E = 98.0238080 exp(-2.78) + 10 = 16.0812507
    # exposure 2 (start 3000 s):             E_end = E_inf + (16.0812507 - E_inf) a = 97.5395387
    #                                        trapped = 81.4582880
    # recorded fraction = 1 - trapped / (f t_exp) = 1 - trapped / 50000.
    pop = TrapPopulation(capacity=100.0, efficiency=0.01, release_time=1000.0)
    start = np.array([0.0, 120.0, 3000.0])
    hist = trap_history(np.full(3, 500.0), start, 100.0, [pop], refill=[10.0],
                        orbit=np.array([0, 0, 1]))
    np.testing.assert_allclose(hist.occupancy_start[0, :, 0], [0.0, 95.5120246, 16.0812507],
                               rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(hist.occupancy_end[0, :, 0], [97.4414954, 98.0238080, 97.5395387],
                               rtol=1e-8)
    np.testing.assert_allclose(hist.trapped[0, :, 0], [97.4414954, 2.5117835, 81.4582880],
                               rtol=1e-7)
    np.testing.assert_allclose(hist.recorded_fraction[:, 0],
                               1 - np.array([97.4414954, 2.5117835, 81.4582880]) / 50000.0,
                               rtol=1e-12)


def _ode_reference(rate, start, texp, pops, initial, refill, orbit):
    """The published differential equation (Zhou et al. 2017, eqs. 1-2) integrated
    numerically with scipy's solve_ivp: lit during exposures, dark between
    them, refill added at each orbit's first exposure.  Independent of the
    closed form used by trap_history."""
    cap = np.array([p.capacity for p in pops])
    eta = np.array([p.efficiency for p in pops])
    tau = np.array([p.release_time for p in pops])
    E = np.array(initial, float)
    trapped = []
    for i in range(start.size):
        if i > 0 and orbit[i] != orbit[i - 1]:
            E = np.minimum(E + refill, cap)
        f = rate[i]
        sol = solve_ivp(lambda t, y: eta * f * (1 - y / cap) - y / tau, (0, texp), E,
                        rtol=1e-11, atol=1e-9, method="LSODA")
        E_end = sol.y[:, -1]
        trapped.append(E_end - E)
        if i + 1 < start.size:
            dark = start[i + 1] - start[i] - texp
            E = E_end * np.exp(-dark / tau)
    return np.array(trapped).T


def test_two_populations_match_the_integrated_equation():
    # Two populations (a fast one with few traps, a slow one with many; the
    # structure of Zhou et al. 2017), three orbits of 6 exposures with a
    # rate that varies from exposure to exposure, against a numerical
    # integration of the published equation.  Tolerance 1e-6 relative
    # (the integrator's rtol is 1e-11).
    rng = np.random.default_rng(3)
    pops = [TrapPopulation(150.0, 0.009, 300.0), TrapPopulation(1400.0, 0.012, 15000.0)]
    start = np.concatenate([o * 5760.0 + np.arange(6) * 110.0 for o in range(3)])
    orbit = np.repeat(np.arange(3), 6)
    rate = 400.0 * (1 + 0.05 * rng.standard_normal(start.size))
    texp = 90.0
    hist = trap_history(rate, start, texp, pops, initial=[20.0, 300.0], refill=[30.0, 80.0],
                        orbit=orbit)
    ref = _ode_reference(rate, start, texp, pops, [20.0, 300.0], np.array([30.0, 80.0]), orbit)
    np.testing.assert_allclose(hist.trapped[:, :, 0], ref, rtol=1e-6, atol=1e-6)
    # the first exposure of each orbit loses the most (the ramp)
    frac = hist.recorded_fraction[:, 0].reshape(3, 6)
    assert np.all(frac[:, 0] < frac[:, -1])


def test_basis_reproduces_history_by_superposition():
    # Defining property: for fixed kappa = eta/E_tot and tau the recorded
    # fraction is linear in (eta, E_0, refill) (Zhou et al. 2017 eqs. 1-3 are
    # linear in E and eta at fixed c), so 1 - columns @ amplitudes equals the
    # history whenever no refill reaches the capacity.  Two series at
    # different rates (the ramp is chromatic through the rate).
    pops = [TrapPopulation(160.0, 0.008, 280.0), TrapPopulation(1500.0, 0.013, 16000.0)]
    start = np.concatenate([o * 5760.0 + np.arange(8) * 100.0 for o in range(4)])
    orbit = np.repeat(np.arange(4), 8)
    rate = np.stack([np.full(start.size, 250.0), np.linspace(600, 580, start.size)], axis=1)
    hist = trap_history(rate, start, 80.0, pops, initial=[10.0, 200.0], refill=[25.0, 60.0],
                        orbit=orbit)
    basis = trap_ramp_basis(rate, start, 80.0, [p.trap_constant for p in pops],
                            [p.release_time for p in pops], orbit=orbit)
    amps = np.array([0.008, 10.0, 25.0, 0.013, 200.0, 60.0])
    assert basis.columns.shape == (start.size, 2, 6)
    np.testing.assert_allclose(1 - basis.columns @ amps, hist.recorded_fraction, rtol=0, atol=1e-13)
    assert basis.names[:3] == ("trap0_eta", "trap0_initial", "trap0_refill")


def test_efficiency_columns_alone_are_the_full_basis_columns():
    # The cheaper forms a shape search uses: the efficiencies' columns alone,
    # with or without derivatives, are those of the full basis to the bit, and
    # reproduce the history of traps empty at the start and never refilled
    # (Zhou et al. 2017 eqs. 1-3, superposition as above).
    pops = [TrapPopulation(160.0, 0.008, 280.0), TrapPopulation(1500.0, 0.013, 16000.0)]
    start = np.concatenate([o * 5760.0 + np.arange(8) * 100.0 for o in range(3)])
    orbit = np.repeat(np.arange(3), 8)
    rate = np.stack([np.full(start.size, 250.0), np.linspace(600, 580, start.size)], axis=1)
    kappa, tau = [p.trap_constant for p in pops], [p.release_time for p in pops]
    full = trap_ramp_basis(rate, start, 80.0, kappa, tau, orbit=orbit)
    eta = trap_ramp_basis(rate, start, 80.0, kappa, tau, orbit=orbit, efficiency_only=True)
    bare = trap_ramp_basis(rate, start, 80.0, kappa, tau, orbit=orbit, efficiency_only=True,
                           derivatives=False)
    assert eta.names == ("trap0_eta", "trap1_eta") and bare.derivatives.shape[0] == 0
    np.testing.assert_array_equal(eta.columns, full.columns[:, :, [0, 3]])
    np.testing.assert_array_equal(bare.columns, eta.columns)
    np.testing.assert_array_equal(eta.derivatives, full.derivatives[:, :, :, [0, 3]])
    hist = trap_history(rate, start, 80.0, pops, orbit=orbit)
    np.testing.assert_allclose(1 - bare.columns @ np.array([0.008, 0.013]), hist.recorded_fraction,
                               rtol=0, atol=1e-13)


def test_basis_derivatives_match_finite_differences():
    # The log-derivatives against a wider finite difference (step 1e-3 in ln;
    # agreement to 1e-5 relative of the largest entry, the truncation error).
    start = np.concatenate([o * 5760.0 + np.arange(5) * 100.0 for o in range(2)])
    orbit = np.repeat([0, 1], 5)
    kappa, tau = np.array([5e-5, 9e-6]), np.array([300.0, 15000.0])
    b = trap_ramp_basis(np.full(start.size, 400.0), start, 80.0, kappa, tau, orbit=orbit)
    h = 1e-3
    up = trap_ramp_basis(np.full(start.size, 400.0), start, 80.0, kappa, tau * [1, np.exp(h)],
                         orbit=orbit).columns
    dn = trap_ramp_basis(np.full(start.size, 400.0), start, 80.0, kappa, tau * [1, np.exp(-h)],
                         orbit=orbit).columns
    fd = (up - dn) / (2 * h)
    np.testing.assert_allclose(b.derivatives[3], fd, rtol=0, atol=1e-5 * np.abs(fd).max())


def test_inputs_not_modified_and_validation():
    rate = np.full(4, 100.0)
    start = np.array([0.0, 100.0, 200.0, 300.0])
    copies = rate.copy(), start.copy()
    pop = TrapPopulation(100.0, 0.01, 500.0)
    trap_history(rate, start, 50.0, [pop])
    np.testing.assert_array_equal(rate, copies[0])
    np.testing.assert_array_equal(start, copies[1])
    with pytest.raises(ParameterError, match="efficiency"):
        TrapPopulation(100.0, 1.5, 500.0)
    with pytest.raises(ParameterError, match="rate must be finite"):
        trap_history(np.array([100.0, np.nan, 1, 1]), start, 50.0, [pop])
    with pytest.raises(ParameterError, match="overlap"):
        trap_history(rate, start, 150.0, [pop])
    with pytest.raises(ParameterError, match="release_times"):
        trap_ramp_basis(rate, start, 50.0, [1e-4], [0.0])
