"""Tests of lightledger.pipeline.phasegrid: phase-curve quantities marginalised over models.

Sources: the marginalisation of Wakeford et al. 2016 (ApJ 819, 10; weights
exp(-BIC/2) normalised, Gibson 2014, MNRAS 445, 3401; BIC of Schwarz 1978, AIC of
Akaike 1974) computed by hand below; a channel's prior on the models taken from the
white light's weights and multiplying each model's likelihood (Bayes' theorem); angles
averaged on one branch (common practice).
"""

from types import SimpleNamespace

import numpy as np
import pytest

from lightledger.pipeline.errors import AllMaskedError, ParameterError
from lightledger.pipeline.phasegrid import fit_phase_grid, marginal_interval, planet_quantity
from lightledger.pipeline.programme import ProgrammeFit


def _joint(chi2, k, n, day, day_err, offset=10.0, radius=None, sides=(None, None)):
    lo, hi = (day_err, day_err) if sides[0] is None else sides
    summary = SimpleNamespace(day=day, day_error=day_err, night=0.1 * day, night_error=day_err,
                              maximum=day, maximum_error=day_err, minimum=0.0,
                              minimum_error=day_err, amplitude=day, amplitude_error=day_err,
                              offset_deg=offset, offset_error_deg=5.0,
                              amplitude_error_lo=lo, amplitude_error_hi=hi,
                              offset_error_lo_deg=4.0, offset_error_hi_deg=6.0)
    return SimpleNamespace(chi2=chi2, n_params=k, n_points=n, summary=summary,
                           fitted_radius=radius is not None,
                           rp_rs=np.nan if radius is None else radius[0],
                           rp_rs_error=np.nan if radius is None else radius[1],
                           transit_depth=np.nan if radius is None else radius[0] ** 2,
                           transit_depth_error=np.nan if radius is None else
                           2 * radius[0] * radius[1])


def test_two_models_by_hand():
    # Model A: chi2 50, k 10, N 100; model B: chi2 45, k 12, N 100.
    # BIC_A = 50 + 10 ln 100 = 96.0517, BIC_B = 45 + 12 ln 100 = 100.2620 (Schwarz 1978).
    # W_A = 1 / (1 + exp(-(100.2620 - 96.0517)/2)) = 1 / (1 + exp(-2.10517))
    # = 1 / (1 + 0.121827) = 0.891405, W_B = 0.108595 (Gibson 2014).  Day side
    # 400 +- 30 ppm (A), 460 +- 40 ppm (B): mean = 0.891405*400 + 0.108595*460 =
    # 406.5157 ppm; within = sqrt(0.891405*900 + 0.108595*1600) = 31.2413; between =
    # sqrt(0.891405*6.5157^2 + 0.108595*53.4843^2) = 18.6678; error =
    # sqrt(within^2 + between^2) = 36.3938 ppm (Wakeford et al. 2016).
    a = ProgrammeFit(white=_joint(50.0, 10, 100, 400e-6, 30e-6),
                     channels=(_joint(50.0, 10, 100, 400e-6, 30e-6),))
    b = ProgrammeFit(white=_joint(45.0, 12, 100, 460e-6, 40e-6),
                     channels=(_joint(30.0, 12, 100, 460e-6, 40e-6),))
    grid = fit_phase_grid([a, b], ["A", "B"])
    np.testing.assert_allclose(grid.weight[:, 0], [0.891405, 0.108595], atol=2e-6)
    np.testing.assert_allclose(grid.value["eclipse_depth"][0], 406.5157e-6, atol=2e-10)
    np.testing.assert_allclose(grid.within["eclipse_depth"][0], 31.2413e-6, atol=2e-10)
    np.testing.assert_allclose(grid.between["eclipse_depth"][0], 18.6678e-6, atol=2e-10)
    np.testing.assert_allclose(grid.error["eclipse_depth"][0], 36.3938e-6, atol=2e-10)
    # the channel weighs the models with the white light's weights as prior: B's chi2 is
    # 20 lower for 2 more parameters, BIC_B - BIC_A = -20 + 2 ln 100 = -10.7897, so
    # W_B = 1 / (1 + (0.891405 / 0.108595) exp(-5.39483)) = 1 / (1 + 8.20852 / 220.2647)
    # = 0.964072 (0.995481 by its own BIC alone)
    np.testing.assert_allclose(grid.weight[1, 1], 0.964072, atol=2e-6)
    assert grid.best.tolist() == [0, 1]
    top = grid.top_fit()
    assert top.white is a.white and top.channels[0] is b.channels[0]
    # no transit in either fit: the radius is not measured
    assert np.isnan(grid.value["transit_depth"][0]) and np.isnan(grid.error["rp_rs"][1])


def test_channels_take_the_white_weights_as_prior_by_hand():
    # Weights proportional to prior x exp(-BIC/2) (Gibson 2014; the prior of a model
    # multiplies its likelihood, Bayes), the prior of a channel being the white light's
    # weights.  N = 50 points everywhere; ln 50 = 3.912023, 2 ln 3 = 2.197225.
    # White: A chi2 40, B chi2 42.197225, both k = 5: exp(-dBIC/2) = 3 -> W = 0.75, 0.25.
    # Channel 0: A chi2 42.197225, B chi2 40, k = 5: B three times as likely as A;
    # prior x likelihood 0.75 x 1 : 0.25 x 3 -> W = 0.5, 0.5 (0.25, 0.75 by its own BIC).
    # Depths 400 and 500 ppm +- 30 ppm: mean 450 ppm, error sqrt(900 + 2500) = 58.3095 ppm
    # (Wakeford et al. 2016).
    # Channel 1: A chi2 30, k = 5; B chi2 30 - ln 50 - 2 ln 9 = 21.693528, k = 6:
    # BIC_B - BIC_A = -2 ln 9, B nine times as likely; 0.75 x 1 : 0.25 x 9 -> W = 0.25, 0.75
    # (0.1, 0.9 by its own BIC).
    two_ln3 = 2 * np.log(3.0)
    a = ProgrammeFit(white=_joint(40.0, 5, 50, 400e-6, 30e-6),
                     channels=(_joint(40.0 + two_ln3, 5, 50, 400e-6, 30e-6),
                               _joint(30.0, 5, 50, 400e-6, 30e-6)))
    b = ProgrammeFit(white=_joint(40.0 + two_ln3, 5, 50, 500e-6, 30e-6),
                     channels=(_joint(40.0, 5, 50, 500e-6, 30e-6),
                               _joint(30.0 - np.log(50.0) - 2 * np.log(9.0), 6, 50,
                                      500e-6, 30e-6)))
    grid = fit_phase_grid([a, b], ["A", "B"])
    np.testing.assert_allclose(grid.weight, [[0.75, 0.5, 0.25], [0.25, 0.5, 0.75]], atol=1e-12)
    np.testing.assert_allclose(grid.value["eclipse_depth"][1], 450e-6, atol=1e-15)
    np.testing.assert_allclose(grid.error["eclipse_depth"][1], 58.3095e-6, atol=2e-10)
    # the criteria themselves are each light curve's own (BIC = chi2 + k ln N)
    np.testing.assert_allclose(grid.bic[:, 2], [30 + 5 * np.log(50.0),
                                                30 - 2 * np.log(9.0) + 5 * np.log(50.0)])
    assert grid.best.tolist() == [0, 0, 1]
    # AIC = chi2 + 2k (Akaike 1974): the white weights are 0.75, 0.25 again (same k); channel
    # 1: AIC_A = 40, AIC_B = 33.693528, exp(-dAIC/2) = 9 sqrt(50) / e = 23.411704, so
    # W_B = 0.25 x 23.411704 / (0.25 x 23.411704 + 0.75) = 5.852926 / 6.602926 = 0.886414
    grid = fit_phase_grid([a, b], ["A", "B"], criterion="aic")
    np.testing.assert_allclose(grid.weight[:, 0], [0.75, 0.25], atol=1e-12)
    np.testing.assert_allclose(grid.weight[:, 2], [0.113586, 0.886414], atol=2e-6)


def test_interval_sides_marginalised_by_hand():
    # Each side of the 68 % interval marginalised as the error is (Wakeford et al. 2016),
    # with that side's own errors.  The models of test_two_models_by_hand (weights
    # 0.891405, 0.108595; amplitudes 400 and 460 ppm, spread term between^2 =
    # 18.6678^2 = 348.487 ppm^2): sides (20, 40) ppm for A and (30, 50) ppm for B give
    # lo = sqrt(0.891405*400 + 0.108595*900 + 348.487) = sqrt(802.785) = 28.3335 ppm and
    # hi = sqrt(0.891405*1600 + 0.108595*2500 + 348.487) = sqrt(2046.223) = 45.2352 ppm;
    # equal offsets (10 deg) add no spread: sides sqrt(16) = 4 and sqrt(36) = 6 deg.
    a = ProgrammeFit(white=_joint(50.0, 10, 100, 400e-6, 30e-6, sides=(20e-6, 40e-6)),
                     channels=())
    b = ProgrammeFit(white=_joint(45.0, 12, 100, 460e-6, 40e-6, sides=(30e-6, 50e-6)),
                     channels=())
    grid = fit_phase_grid([a, b], ["A", "B"])
    lo, hi = marginal_interval(grid, "amplitude")
    np.testing.assert_allclose([lo[0], hi[0]], [28.3335e-6, 45.2352e-6], atol=2e-10)
    lo, hi = marginal_interval(grid, "offset_deg")
    np.testing.assert_allclose([lo[0], hi[0]], [4.0, 6.0], rtol=1e-12)
    with pytest.raises(ParameterError):
        marginal_interval(grid, "eclipse_depth")


def test_offsets_are_averaged_on_one_branch_and_failed_fits_drop_out():
    # Offsets of +179 and -179 degrees are 2 degrees apart, not 358: the mean of
    # two equal-weight models is 180 (= -180), their spread 1 degree.
    a = ProgrammeFit(white=_joint(50.0, 10, 100, 4e-4, 3e-5, offset=179.0), channels=())
    b = ProgrammeFit(white=_joint(50.0, 10, 100, 4e-4, 3e-5, offset=-179.0), channels=())
    grid = fit_phase_grid([a, b, None], ["A", "B", "C"], failures=["C: singular"])
    np.testing.assert_allclose(grid.weight[:, 0], [0.5, 0.5, 0.0])
    assert abs(abs(grid.value["offset_deg"][0]) - 180.0) < 1e-9
    np.testing.assert_allclose(grid.between["offset_deg"][0], 1.0)
    assert grid.failures == ("C: singular",)
    with pytest.raises(AllMaskedError, match="no systematics model"):
        fit_phase_grid([None], ["A"])
    with pytest.raises(ParameterError, match="one name per fit"):
        fit_phase_grid([a], ["A", "B"])


def test_planet_quantity_reads_the_joint_fit():
    jf = _joint(1.0, 1, 10, 5e-4, 1e-5, radius=(0.1, 0.001))
    assert planet_quantity(jf, "transit_depth") == pytest.approx((0.01, 2e-4))
    assert planet_quantity(jf, "max_flux") == (5e-4, 1e-5)
    assert np.isnan(planet_quantity(SimpleNamespace(summary=None, fitted_radius=False),
                                    "amplitude")[0])
