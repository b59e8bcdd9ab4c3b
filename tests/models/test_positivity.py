"""Tests of emulant.models.positivity: the positivity.json content."""

from __future__ import annotations

import json

import numpy as np
import pytest

from emulant.models.positivity import c_statistic, positivity_summary, top_share
from emulant.models.propensity import PropensityModel
from emulant.models.weights import estimand_weights, kish_ess


def test_c_statistic_equals_sklearn_roc_auc_with_ties():
    # Reference: sklearn.metrics.roc_auc_score.
    from sklearn.metrics import roc_auc_score

    rng = np.random.default_rng(21)
    a = (rng.random(1000) < 0.35).astype(float)
    e = np.round(rng.beta(2 + a, 3), 2)  # rounding makes many ties
    assert c_statistic(a, e) == pytest.approx(roc_auc_score(a, e), abs=1e-12)
    assert c_statistic(a, np.full(1000, 0.4)) == pytest.approx(0.5)


def test_top_share_by_hand():
    # Hand computation: 200 persons, the top 1% are the 2 largest weights, 10 + 8 of 216.
    w = np.r_[np.ones(198), 10.0, 8.0]
    assert top_share(w) == pytest.approx(18 / 216)


def test_positivity_summary_contents():
    rng = np.random.default_rng(22)
    n = 3000
    x = rng.normal(size=(n, 2))
    a = (rng.random(n) < 1 / (1 + np.exp(-(2.5 * x[:, 0] - 0.3)))).astype(float)
    model = PropensityModel().fit(x, a, columns=["x1", "x2"])
    e = model.predict(x)
    w = {est: estimand_weights(a, e, est) for est in ("ATE", "ATT")}
    out = positivity_summary(a, e, w, ("drug_a", "drug_b"), model=model, columns=["x1", "x2"],
                             truncated={"ATE": False, "ATT": False})
    json.dumps(out)  # plain types only
    assert out["n"] == {"drug_a": int(a.sum()), "drug_b": int(n - a.sum())}
    bins = out["propensity_bins"]
    assert len(bins["edges"]) == 21 and bins["edges"][0] == 0 and bins["edges"][-1] == 1
    for arm, m in (("drug_a", a == 1), ("drug_b", a == 0)):
        assert len(bins["counts"][arm]) == 20 and sum(bins["counts"][arm]) == m.sum()
        assert bins["counts"][arm][3] == int(((e[m] >= 0.15) & (e[m] < 0.2)).sum())
    ext = out["extreme"]
    assert (ext["low"], ext["high"]) == (0.025, 0.975)
    assert ext["n"] == int(((e < 0.025) | (e > 0.975)).sum()) and ext["n"] > 0
    assert ext["share"] == pytest.approx(ext["n"] / n)
    ate = out["weights"]["ATE"]
    # no individual weight (disclosure rule); quantiles as numpy computes them (linear, type 7)
    assert not {"min", "max", "largest"} & set(ate)
    assert ate["quantiles"]["50%"] == pytest.approx(np.median(w["ATE"]))
    assert ate["quantiles"]["99%"] == pytest.approx(np.quantile(w["ATE"], 0.99))
    assert list(ate["quantiles"]) == ["1%", "5%", "25%", "50%", "75%", "95%", "99%"]
    assert ate["mean"]["drug_a"] == pytest.approx(w["ATE"][a == 1].mean())
    assert ate["ess"]["drug_b"] == pytest.approx(kish_ess(w["ATE"][a == 0]))
    assert 0 < ate["top1pct_share"] < 1 and ate["truncated"] is False
    assert out["weights"]["ATT"]["mean"]["drug_a"] == 1.0
    assert out["model"] == {"converged": True, "penalized": False, "warnings": [],
                            "columns": ["x1", "x2"]}
    assert 0.5 < out["c_statistic"] <= 1
