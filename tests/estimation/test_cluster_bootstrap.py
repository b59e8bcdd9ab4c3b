"""The bootstrap of person-trials resamples persons with all their trials (CONTRACTS §5c).

Outside reference: the cluster-robust (sandwich) standard error of a difference in means, from
statsmodels' OLS with ``cov_type="cluster"`` (Liang & Zeger 1986, Biometrika 73:13; Cameron &
Miller 2015, J Hum Resour 50:317). The person bootstrap's standard error of the same difference
agrees with it, while resampling person-trials as if they were independent agrees with the
heteroskedasticity-robust SE that ignores the clustering and is visibly smaller. Invented data.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import statsmodels.api as sm

from emulant.estimation.bootstrap import resampling_units, run_bootstrap, unit_freq


def _person_trials(n_persons: int = 400, trials: int = 8, seed: int = 3) -> pd.DataFrame:
    """Each person in every trial; a person's outcome is mostly their own (shared across their
    trials), so rows of one person are strongly correlated."""
    rng = np.random.default_rng(seed)
    pid = np.repeat(np.arange(n_persons), trials)
    person_effect = np.repeat(rng.normal(0, 1, n_persons), trials)
    treated = np.repeat(rng.random(n_persons) < 0.4, trials).astype(int)
    y = 0.3 * treated + person_effect + rng.normal(0, 0.2, len(pid))
    return pd.DataFrame({"person_id": pid + 1000, "trial": np.tile(np.arange(trials), n_persons),
                         "treated": treated, "y": y})


def _difference(df: pd.DataFrame, freq: np.ndarray) -> tuple[list[dict], list[dict]]:
    a, y = df["treated"].to_numpy(), df["y"].to_numpy()
    m1 = np.average(y[a == 1], weights=freq[a == 1])
    m0 = np.average(y[a == 0], weights=freq[a == 0])
    return [{"outcome": "y", "measure": "mean_difference", "estimate": m1 - m0}], []


def _se(df: pd.DataFrame, clusters) -> float:
    protocol = SimpleNamespace(analysis=SimpleNamespace(bootstrap=SimpleNamespace(
        replicates=400, seed=20261201, interval="wald", kind="multinomial")))
    rows, curves = _difference(df, np.ones(len(df)))
    run = run_bootstrap(lambda f: _difference(df, f), len(df), protocol, rows, curves,
                        workers=1, progress=False, clusters=clusters)
    return float(np.std(run.row_reps[:, 0], ddof=1))


def test_person_bootstrap_matches_cluster_robust_se_and_row_bootstrap_is_narrower():
    df = _person_trials()
    clusters, base = resampling_units(df)
    assert base is None and clusters.max() == 399
    assert (clusters == np.repeat(np.arange(400), 8)).all()
    ols = sm.OLS(df["y"], sm.add_constant(df["treated"]))
    se_cluster = float(ols.fit(cov_type="cluster", cov_kwds={"groups": df["person_id"]}).bse.iloc[1])
    se_hc = float(ols.fit(cov_type="HC0").bse.iloc[1])
    by_person, by_row = _se(df, clusters), _se(df, None)
    # 400 replicates: a bootstrap SE is within about 10% of its target (SE of an SE ~ 1/sqrt(2B))
    assert abs(by_person / se_cluster - 1) < 0.12, (by_person, se_cluster)
    assert abs(by_row / se_hc - 1) < 0.12, (by_row, se_hc)
    # eight correlated trials per person: the row bootstrap's interval is far too narrow
    assert by_row < 0.5 * by_person


def test_unit_freq_gives_each_person_one_draw_and_keeps_sample_weights():
    clusters = np.array([0, 0, 0, 1, 2, 2])
    base = np.array([1.0, 4.0, 1.0, 4.0, 1.0, 1.0])
    f = unit_freq(6, 7, 0, "multinomial", clusters, None)
    assert f[0] == f[1] == f[2] and f[4] == f[5]
    assert f[[0, 3, 4]].sum() == 3  # three persons drawn three times in all
    assert np.array_equal(unit_freq(6, 7, 0, "multinomial", clusters, base), f * base)
    df = pd.DataFrame({"person_id": [5, 5, 9], "trial": [0, 1, 0], "sample_weight": [1.0, 2.0, 2.0]})
    c, b = resampling_units(df)
    assert c.tolist() == [0, 0, 1] and b.tolist() == [1.0, 2.0, 2.0]
    clones = df.drop(columns=["trial", "sample_weight"])  # a person in every arm (design clone)
    assert resampling_units(clones)[0].tolist() == [0, 0, 1] and resampling_units(clones)[1] is None
    assert resampling_units(clones.drop_duplicates("person_id")) == (None, None)
