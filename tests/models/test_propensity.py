"""Tests of emulant.models.propensity: the design matrix and the logistic propensity model."""

from __future__ import annotations

import warnings

import nhefs_data
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from emulant.models.propensity import (
    DesignError,
    PropensityModel,
    PropensityWarning,
    build_design,
    rcs_basis,
)

# The model of Hernán & Robins, "Causal Inference: What If", chapter 12 (Program 12.2).
NHEFS_COVARIATES, NHEFS_KINDS = nhefs_data.BOOK_COVARIATES, nhefs_data.BOOK_KINDS


@pytest.fixture(scope="module")
def nhefs() -> pd.DataFrame:
    """NHEFS from the causaldata package: the 1,566 persons with wt82_71 (FIELD_NOTES: the
    categoricals are stored as strings, cast to int)."""
    d = nhefs_data.load(complete=True)
    assert len(d) == 1566
    return d


def _rank(m: np.ndarray) -> int:
    return int(np.linalg.matrix_rank(np.column_stack([np.ones(len(m)), m])))


def test_propensity_equals_statsmodels_logit_on_nhefs(nhefs):
    # Reference: statsmodels Logit (Newton, tight tolerance) on the same design.
    design = build_design(nhefs, NHEFS_COVARIATES, NHEFS_KINDS, continuous="quadratic")
    X = design.transform(nhefs)
    a = nhefs["qsmk"].to_numpy()
    assert X.shape == (1566, 18)  # 2 + 2*4 quadratic + 4 + 2 + 2 dummies, as in the book's model
    model = PropensityModel().fit(X, a, columns=design.columns)
    ref = sm.Logit(a, sm.add_constant(X)).fit(disp=0, method="newton", tol=1e-12, maxiter=100)
    assert model.converged_ and not model.penalized_ and model.warnings_ == []
    np.testing.assert_allclose(model.predict(X), ref.predict(sm.add_constant(X)), atol=1e-6)
    np.testing.assert_allclose(np.r_[model.intercept_, model.coef_], ref.params, rtol=1e-6,
                               atol=1e-8)


def test_frequency_weights_equal_duplicated_rows():
    # Fact of the method (frequency weights): weight k == the row repeated k times.
    rng = np.random.default_rng(1)
    X = rng.normal(size=(300, 3))
    a = (rng.random(300) < 1 / (1 + np.exp(-X @ [0.5, -1, 0.3]))).astype(float)
    f = rng.integers(0, 4, size=300).astype(float)
    m1 = PropensityModel().fit(X, a, sample_weight=f)
    rep = np.repeat(np.arange(300), f.astype(int))
    m2 = PropensityModel().fit(X[rep], a[rep])
    np.testing.assert_allclose(m1.coef_, m2.coef_, rtol=1e-8)
    np.testing.assert_allclose(m1.predict(X), m2.predict(X), atol=1e-10)


def test_warm_start_gives_the_same_fit():
    rng = np.random.default_rng(2)
    X = rng.normal(size=(500, 4))
    a = (rng.random(500) < 0.4).astype(float)
    m = PropensityModel(warm_start=True).fit(X, a)
    first = m.coef_.copy()
    m.fit(X, a)
    assert m.n_iter_ <= 2
    np.testing.assert_allclose(m.coef_, first, rtol=1e-8, atol=1e-12)


def test_separation_by_a_binary_column_warns_naming_it_and_falls_back():
    # Quasi-complete separation (Albert & Anderson 1984): every person with rare_flag = 1 is
    # treated, so the MLE of its coefficient is infinite.
    rng = np.random.default_rng(3)
    n = 400
    cohort = pd.DataFrame({"age": rng.normal(60, 10, n), "rare_flag": 0})
    a = (rng.random(n) < 0.4).astype(float)
    idx = np.flatnonzero(a == 1)[:6]
    cohort.loc[idx, "rare_flag"] = 1
    design = build_design(cohort, ["age", "rare_flag"],
                          {"age": "continuous", "rare_flag": "binary"}, "linear")
    X = design.transform(cohort)
    with pytest.warns(PropensityWarning, match="rare_flag"):
        m = PropensityModel().fit(X, a, columns=design.columns)
    assert m.penalized_ and m.converged_
    assert any("rare_flag" in w for w in m.warnings_)
    assert np.all(np.isfinite(m.coef_)) and abs(m.coef_[1]) < 10
    e = m.predict(X)
    assert np.all((e > 0) & (e < 1))


def test_separation_by_a_continuous_column_is_caught_by_non_convergence():
    rng = np.random.default_rng(4)
    x = rng.normal(size=200)
    a = (x > 0.3).astype(float)  # complete separation on x
    with pytest.warns(PropensityWarning, match="x0"):
        m = PropensityModel().fit(np.column_stack([x, rng.normal(size=200)]), a)
    assert m.penalized_ and np.all(np.isfinite(m.coef_))


def test_no_warning_on_a_well_posed_fit():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(1000, 3))
    a = (rng.random(1000) < 0.5).astype(float)
    with warnings.catch_warnings():
        warnings.simplefilter("error", PropensityWarning)
        m = PropensityModel().fit(X, a)
    assert m.converged_ and not m.penalized_


def test_rcs_basis_spans_the_natural_cubic_spline_space():
    # Reference: patsy's cr() (natural cubic regression spline) spans the same space as
    # Harrell's restricted cubic spline with the same knots (both: cubic between knots,
    # linear beyond the outer ones).
    patsy = pytest.importorskip("patsy")
    rng = np.random.default_rng(6)
    x = rng.gamma(3, 10, size=500)
    knots = np.quantile(x, [0.05, 0.35, 0.65, 0.95])
    ours = np.column_stack([np.ones_like(x), x, rcs_basis(x, knots)])
    ref = np.asarray(patsy.dmatrix(
        f"cr(x, knots=({knots[1]}, {knots[2]}), lower_bound={knots[0]}, "
        f"upper_bound={knots[3]}) - 1", {"x": np.clip(x, knots[0], knots[3])}))
    # outside the outer knots patsy extrapolates differently, so compare within them
    inside = (x >= knots[0]) & (x <= knots[3])
    q, _ = np.linalg.qr(ref[inside])
    resid = ours[inside] - q @ (q.T @ ours[inside])
    assert np.abs(resid).max() < 1e-8 * np.abs(ours[inside]).max()
    # linear beyond the outer knots (fact of the method): second differences vanish
    far = np.linspace(knots[3], knots[3] + 50, 7)
    assert np.allclose(np.diff(rcs_basis(far, knots), n=2, axis=0), 0, atol=1e-9)


def test_coinciding_knots_of_a_count_never_give_a_singular_matrix():
    rng = np.random.default_rng(7)
    n = 2000
    cohort = pd.DataFrame({
        "n_visits": rng.poisson(0.4, n),  # mostly 0: the 5th/35th/65th percentiles coincide
        "n_drugs": rng.poisson(2.0, n),  # few distinct values
        "two_values": rng.integers(0, 2, n) * 5,  # continuous kind, two distinct values
        "age": rng.normal(60, 8, n),
    })
    kinds = dict.fromkeys(cohort.columns, "continuous")
    design = build_design(cohort, list(cohort.columns), kinds, "spline")
    X = design.transform(cohort)
    assert _rank(X) == X.shape[1] + 1
    kinds_by_source = {t.source: t.kind for t in design.terms}
    assert kinds_by_source["age"] == "spline" and len(design.terms[3].knots) == 4
    assert all(len(t.knots) in (0, 3, 4) for t in design.terms)
    assert len(set(design.terms[0].knots)) == len(design.terms[0].knots)


def test_categorical_reference_is_the_most_frequent_level_and_indicators():
    cohort = pd.DataFrame({
        "region": ["north", "south", "south", "east", "south", "north", "east", "south"],
        "hba1c": [7.0, 6.5, 6.8, 6.8, 8.1, 6.8, 7.7, 5.9],
        "hba1c_missing": [0, 0, 1, 0, 0, 1, 0, 0],
        "bmi": [25.0, 27, 30, 22, 28, 26, 24, 29],
        "bmi_missing": 0,  # constant: left out
        "const": 1.0,
        "double_bmi": [50.0, 54, 60, 44, 56, 52, 48, 58],
    })
    kinds = {"region": "categorical", "hba1c": "continuous", "bmi": "continuous",
             "const": "continuous", "double_bmi": "continuous"}
    design = build_design(cohort, list(kinds), kinds, "linear")
    assert design.columns == ("region: east", "region: north", "hba1c", "hba1c_missing", "bmi")
    assert design.terms[0].reference == "south"
    assert dict(design.dropped) == {"bmi_missing": "constant", "const": "constant",
                                    "double_bmi": "linear in the earlier columns"}
    X = design.transform(cohort)
    np.testing.assert_array_equal(X[:, 0], [0, 0, 0, 1, 0, 0, 1, 0])
    # transform reuses the learned levels: a subset of rows gives the same columns
    np.testing.assert_array_equal(design.transform(cohort.iloc[[1, 2]]), X[[1, 2]])
    with pytest.raises(DesignError, match="region"):
        design.transform(cohort.assign(region="west"))


def test_quadratic_and_errors_name_the_column():
    cohort = pd.DataFrame({"age": [40.0, 50, 60, 70, 80, np.nan],
                           "sex": ["F", "M", "F", "M", "F", "F"]})
    with pytest.raises(DesignError, match="age.*missing"):
        build_design(cohort, ["age"], {"age": "continuous"}, "quadratic")
    with pytest.raises(DesignError, match="no column for covariate 'bmi'"):
        build_design(cohort, ["bmi"], {"bmi": "continuous"})
    d = build_design(cohort.iloc[:5], ["age", "sex"], {"age": "continuous", "sex": "binary"},
                     "quadratic")
    assert d.columns == ("age", "age (squared)", "sex: M")
    np.testing.assert_array_equal(d.transform(cohort.iloc[:3])[:, 1], [1600, 2500, 3600])


def test_refit_after_modifying_the_design_in_place_is_not_stale():
    # The per-design preparation is cached for bootstrap refits; a changed array is re-prepared.
    rng = np.random.default_rng(8)
    X = rng.normal(size=(400, 2))
    a = (rng.random(400) < 1 / (1 + np.exp(-X[:, 0]))).astype(float)
    first = PropensityModel().fit(X, a).coef_.copy()
    X[:, 0] *= 2.0
    np.testing.assert_allclose(PropensityModel().fit(X, a).coef_, first / [2.0, 1.0], rtol=1e-8)
