"""The NHEFS survival example through the real pipeline: extract -> cohort -> weights -> effects.

Open data: the `causaldata` package's ``nhefs`` (1,629 smokers examined in 1971 and followed to
the end of 1992). Published analysis: Hernán & Robins, "Causal Inference: What If", chapter 17
(death by 120 months of follow-up from January 1983, quitting smoking between 1971 and 1982).
Expected values, from memory: the IP-weighted survival at 120 months is about 80.7% in both
groups (difference about 0.2%, 95% CI about -4.1% to 3.7%), the parametric g-formula difference
about 0.5%, and the hazard ratio of the IP-weighted hazards model about 1.0. The tolerances below
allow for our day-level follow-up, 30-day periods and spline terms where the book uses months
and quadratic terms.

The dataset is rewritten as a registry-style extract: one invented dispensing code at time zero
(1983-01-01) per person by ``qsmk``, deaths dated from ``yrdth``/``modth``/``dadth`` when
``death`` is 1 (FIELD_NOTES: ``death`` decides), and administrative end on 1992-12-31.
"""

from __future__ import annotations

import nhefs_data
import numpy as np
import pandas as pd
import pytest
import yaml

causaldata = pytest.importorskip("causaldata")
cohort_mod = pytest.importorskip("emulant.cohort")

from emulant.estimation.sample import build_sample  # noqa: E402
from emulant.estimation.tte import time_to_event_estimates  # noqa: E402
from emulant.extract import open_extract  # noqa: E402
from emulant.models.weights import design_for  # noqa: E402
from emulant.protocol import load_protocol  # noqa: E402

HORIZON = 3652  # 1992-12-31 is day 3652 after 1983-01-01: 120 months
CATEGORICAL = ("race", "education", "exercise", "active")
CONTINUOUS = ("age71", "smokeintensity", "smokeyrs", "wt71")


def _write_extract(folder):
    d = nhefs_data.load()
    pid = d["seqn"].astype(int)
    persons = pd.DataFrame({
        "person_id": pid,
        # completed age on 1983-01-01 is age + 12 (age at the 1971 examination)
        "birth_date": [f"{1971 - int(a)}-01-01" for a in d["age"]],
        "sex": np.where(d["sex"] == 1, "F", "M"),
        "age71": d["age"].astype(float),
        **{c: d[c].astype(str) for c in CATEGORICAL},
        **{c: d[c].astype(float) for c in CONTINUOUS if c != "age71"},
    })
    coverage = pd.DataFrame({"person_id": pid, "start_date": "1980-01-01",
                             "end_date": "1993-12-31"})
    dispensings = pd.DataFrame({"person_id": pid, "date": "1983-01-01",
                                "code": np.where(d["qsmk"] == 1, "QX1", "NQ1")})
    dead = d[d["death"] == 1]
    first = pd.to_datetime(pd.DataFrame({"year": 1900 + dead["yrdth"].astype(int),
                                         "month": dead["modth"].astype(int), "day": 1}))
    day = np.minimum(dead["dadth"].astype(int), first.dt.days_in_month) - 1
    deaths = pd.DataFrame({"person_id": dead["seqn"].astype(int),
                           "date": (first + pd.to_timedelta(day, unit="D")).dt.strftime("%Y-%m-%d")})
    folder.mkdir()
    for name, df in (("persons", persons), ("coverage", coverage),
                     ("dispensings", dispensings), ("deaths", deaths)):
        df.to_csv(folder / f"{name}.csv", index=False)


def _write_protocol(path):
    covs = [{"name": "sex", "builtin": "sex"}]
    covs += [{"name": c, "attribute": c, "kind": "categorical"} for c in CATEGORICAL]
    covs += [{"name": c, "attribute": c, "kind": "continuous"} for c in CONTINUOUS]
    protocol = {
        "study": {"id": "nhefs-survival"},
        "concepts": {"quit": {"source": "dispensings", "codes": ["QX1"], "match": "exact"},
                     "no_quit": {"source": "dispensings", "codes": ["NQ1"], "match": "exact"}},
        "eligibility": {"entry": {"start": "1983-01-01", "end": "1983-01-01"}},
        "strategies": {"arms": {"quit": {"initiate": "quit"}, "no_quit": {"initiate": "no_quit"}},
                       "treated": "quit"},
        "follow_up": {"max_days": HORIZON, "administrative_end": "1992-12-31"},
        "outcomes": {"primary": "death"},
        "covariates": covs,
        "estimands": ["ATE"],
        "analysis": {"propensity": {"continuous": "quadratic"},
                     "weights": {"stabilize": True},
                     "horizons_days": [HORIZON], "methods": ["ipw", "standardization"],
                     "hazard_ratio": True, "period_days": 30},
    }
    path.write_text(yaml.safe_dump(protocol, sort_keys=False))


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    root = tmp_path_factory.mktemp("nhefs")
    _write_extract(root / "extract")
    _write_protocol(root / "protocol.yaml")
    protocol = load_protocol(root / "protocol.yaml")
    extract = open_extract(root / "extract", protocol)
    cohort = cohort_mod.build_cohort(extract, protocol).cohort
    sample = build_sample(cohort, protocol, design_for(cohort, protocol))
    rows, curves = time_to_event_estimates(sample, "death")
    return cohort, pd.DataFrame(rows), pd.DataFrame(curves)


def _get(df, method, measure, arm=None):
    sub = df[(df.method == method) & (df.measure == measure)]
    if arm is not None:
        sub = sub[sub.arm == arm]
    return sub


def test_cohort_is_the_nhefs_sample(results):
    cohort, rows, _ = results
    # every person enters, in the arm of qsmk; every death of the dataset falls by the end of 1992
    d = causaldata.nhefs.load_pandas().data
    assert len(cohort) == len(d) == 1629
    assert int((cohort["arm"] == "quit").sum()) == int(d["qsmk"].sum())
    crude = _get(rows, "unadjusted", "risk")
    assert int(crude["events"].sum()) == int(d["death"].sum())


def test_ip_weighted_risks_what_if_ch17(results):
    _, rows, _ = results
    risk = _get(rows, "ipw", "risk").set_index("arm")["estimate"]
    # What If ch. 17 (from memory): survival 80.7% in both groups at 120 months
    assert risk["quit"] == pytest.approx(1 - 0.807, abs=0.01)
    assert risk["no_quit"] == pytest.approx(1 - 0.807, abs=0.01)
    rd = _get(rows, "ipw", "risk_difference")["estimate"].iloc[0]
    # published survival difference about 0.2% (quitters minus not): risk difference -0.2%
    assert rd == pytest.approx(-0.002, abs=0.01)
    hr = _get(rows, "ipw", "hazard_ratio")["estimate"].iloc[0]
    assert hr == pytest.approx(1.0, abs=0.1)  # published about 1.0


def test_gformula_what_if_ch17(results):
    _, rows, curves = results
    rd = _get(rows, "standardization", "risk_difference")["estimate"].iloc[0]
    assert rd == pytest.approx(-0.005, abs=0.01)  # survival difference about 0.5% (from memory)
    risk = _get(rows, "standardization", "risk").set_index("arm")["estimate"]
    assert risk["no_quit"] == pytest.approx(1 - 0.807, abs=0.015)
    # the unadjusted comparison differs (quitters are older): crude risk higher among quitters
    crude = _get(rows, "unadjusted", "risk_difference")["estimate"].iloc[0]
    assert crude > rd + 0.02
    g = curves[(curves.method == "standardization")]
    assert g.day.max() == HORIZON and (g.risk >= 0).all()
