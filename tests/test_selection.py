"""Tests of lightledger.pipeline.selection: information criteria, weights, marginalisation."""

import numpy as np
import pytest

from lightledger.pipeline.errors import AllMaskedError, ParameterError
from lightledger.pipeline.selection import information_criteria, marginalise, model_weights


def test_two_models_by_hand():
    # Hand computation (Schwarz 1978 BIC = chi2 + k ln n; Akaike 1974 AIC =
    # chi2 + 2k; weights exp(-IC/2) normalised and the marginalised mean and
    # error of Wakeford et al. 2016, ApJ 819, 10).
    # Model A: chi2 = 100, k = 5; model B: chi2 = 96, k = 7; n = 100 points.
    #   BIC_A = 100 + 5 ln 100 = 123.025851,  BIC_B = 96 + 7 ln 100 = 128.236191
    #   Delta = 2 ln 100 - 4,  exp(-Delta/2) = e^2 / 100 = 0.0738906
    #   W_A = 1 / (1 + 0.0738906) = 0.931194,  W_B = 0.068806
    #   AIC_A = AIC_B = 110: equal weights 0.5.
    # Depths 0.0140 +- 0.00010 (A) and 0.0143 +- 0.00012 (B):
    #   mean  = 0.0140 + 0.068806 * 0.0003 = 0.01402064
    #   within  = 0.931194e-8 + 0.068806 * 1.44e-8 = 1.030275e-8
    #   between = W_A (0.0140 - mean)^2 + W_B (0.0143 - mean)^2 = 5.76649e-9
    #   error = sqrt(1.030275e-8 + 5.76649e-9) = 1.267645e-4
    bic, aic = information_criteria([100.0, 96.0], [5, 7], 100)
    np.testing.assert_allclose(bic, [123.025851, 128.236191], rtol=1e-8)
    np.testing.assert_allclose(aic, [110.0, 110.0])
    w = model_weights(bic)
    np.testing.assert_allclose(w, [1 / (1 + np.e ** 2 / 100), 1 - 1 / (1 + np.e ** 2 / 100)], rtol=1e-12)
    np.testing.assert_allclose(w, [0.931194, 0.068806], atol=1e-6)
    np.testing.assert_allclose(model_weights(aic), [0.5, 0.5])
    m = marginalise([0.0140, 0.0143], [1.0e-4, 1.2e-4], w)
    assert m.value == pytest.approx(0.01402064, rel=1e-6)
    assert m.within == pytest.approx(np.sqrt(1.030275e-8), rel=1e-6)
    assert m.between == pytest.approx(np.sqrt(5.76649e-9), rel=1e-5)
    assert m.error == pytest.approx(1.267645e-4, rel=1e-6)


def test_many_channels_and_large_differences():
    # Weights relative to the best criterion: a difference of 2000 must not
    # underflow to 0/0 (exp(-1000) is 0 in double precision).  One shared
    # weight vector for many channels equals the per-channel computation.
    w = model_weights([5000.0, 3000.0, 3002.0])
    np.testing.assert_allclose(w, [0.0, 1 / (1 + np.exp(-1)), np.exp(-1) / (1 + np.exp(-1))])
    rng = np.random.default_rng(0)
    x = rng.normal(0.01, 1e-4, (3, 6))
    e = rng.uniform(5e-5, 2e-4, (3, 6))
    shared = marginalise(x, e, w)
    for j in range(6):
        one = marginalise(x[:, j], e[:, j], w)
        assert shared.value[j] == pytest.approx(float(one.value))
        assert shared.error[j] == pytest.approx(float(one.error))


def test_one_model_gives_its_own_numbers_and_failed_fits_drop_out():
    # A single model: the mean is its value and the error its own (no spread).
    m = marginalise([0.02], [3e-4], [1.0])
    assert float(m.value) == 0.02 and float(m.error) == pytest.approx(3e-4)
    # A failed model (NaN criterion) gets weight 0 and its NaN value is ignored.
    w = model_weights([np.nan, 10.0])
    np.testing.assert_array_equal(w, [0.0, 1.0])
    m = marginalise([np.nan, 0.5], [np.nan, 0.1], w)
    assert float(m.value) == 0.5 and float(m.error) == pytest.approx(0.1)


def test_validation():
    with pytest.raises(AllMaskedError):
        model_weights([np.nan, np.inf])
    with pytest.raises(ParameterError, match="sum to 1"):
        marginalise([1.0, 2.0], [0.1, 0.1], [0.5, 0.6])
    with pytest.raises(ParameterError, match="non-finite"):
        marginalise([1.0, np.nan], [0.1, 0.1], [0.5, 0.5])
    with pytest.raises(ParameterError, match="n_params"):
        information_criteria([1.0], [-1], 10)


def test_prior_weights_by_hand():
    # Bayes' theorem with the criterion as -2 ln evidence: W ∝ p e^(-IC/2).
    # BIC 10 and 12, priors 0.2 and 0.8: 0.2 e^-5 = 1.347589e-3, 0.8 e^-6 = 1.983010e-3,
    # W = (0.404610, 0.595390).
    w = model_weights([10.0, 12.0], prior=[0.2, 0.8])
    np.testing.assert_allclose(w, [0.404610, 0.595390], atol=1e-6)
    # a model of prior 0 weighs nothing; priors need not be normalised
    np.testing.assert_allclose(model_weights([10.0, 12.0, 5.0], prior=[1, 4, 0]),
                               [0.404610, 0.595390, 0.0], atol=1e-6)
    # where every fitted model has prior 0, the criterion alone decides
    np.testing.assert_allclose(model_weights([10.0, np.nan], prior=[0.0, 1.0]), [1.0, 0.0])
    # per column (models along axis 0), a prior for each
    w2 = model_weights(np.array([[10.0, 10.0], [12.0, 12.0]]), prior=np.array([[0.2, 1], [0.8, 1]]))
    np.testing.assert_allclose(w2[:, 0], [0.404610, 0.595390], atol=1e-6)
    np.testing.assert_allclose(w2[:, 1], [1 / (1 + np.exp(-1)), 1 - 1 / (1 + np.exp(-1))])
    with pytest.raises(ParameterError, match="prior"):
        model_weights([1.0, 2.0], prior=[-1.0, 1.0])
