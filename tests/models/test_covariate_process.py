"""Models of time-varying covariates for the g-formula, against statsmodels (a general-purpose
reference library) and by construction."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from emulant.models.covariate_process import fit_linear, fit_logistic, independent_columns


def test_linear_fit_with_frequency_weights_equals_statsmodels_wls_and_drops_collinear_columns():
    rng = np.random.default_rng(1)
    n = 400
    k = rng.integers(1, 4, n)
    x = rng.normal(size=n)
    # period indicators for k = 1, 2, 3 add up to the intercept: the last is dropped
    Z = np.column_stack([x, k == 1, k == 2, k == 3, np.zeros(n)]).astype(float)
    y = 1.0 + 2.0 * x + 0.5 * (k == 2) + rng.normal(size=n)
    f = rng.integers(0, 4, n).astype(float)
    m = fit_linear(Z, y, f)
    np.testing.assert_array_equal(m.keep, [True, True, True, False, False])
    ref = sm.WLS(y, sm.add_constant(Z[:, :3]), weights=f).fit()
    np.testing.assert_allclose(np.r_[m.intercept, m.coef], ref.params, rtol=1e-8)
    # residuals of the rows with a positive weight, resampled with those weights
    assert m.residuals.size == int((f > 0).sum())
    draws = m.draw(Z[:3], np.random.default_rng(0)) - m.mean(Z[:3])
    assert np.isin(np.round(draws, 12), np.round(m.residuals, 12)).all()


def test_logistic_fit_equals_statsmodels_glm_and_a_value_that_never_varies_is_constant():
    rng = np.random.default_rng(2)
    n = 600
    Z = rng.normal(size=(n, 2))
    y = (rng.random(n) < 1 / (1 + np.exp(-(-0.5 + Z @ [1.0, -0.7])))).astype(float)
    f = rng.integers(1, 3, n).astype(float)
    m = fit_logistic(Z, y, f)
    ref = sm.GLM(y, sm.add_constant(Z), family=sm.families.Binomial(), freq_weights=f).fit()
    np.testing.assert_allclose(np.r_[m.intercept, m.coef], ref.params, rtol=1e-6)
    assert m.mean(Z) == pytest.approx(ref.predict(sm.add_constant(Z)), rel=1e-6)
    zero = fit_logistic(Z, np.zeros(n), f)
    assert zero.constant == 0.0 and (zero.draw(Z, rng) == 0).all()


def test_independent_columns_keeps_the_earlier_of_two_collinear_columns():
    Z = np.column_stack([np.arange(5.0), 2 * np.arange(5.0), np.ones(5), [0, 1, 0, 1, 1.0]])
    np.testing.assert_array_equal(independent_columns(Z, np.ones(5)), [True, False, False, True])
