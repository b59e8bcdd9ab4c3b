"""Tests of the invented registry generator (synthetic_cohort/).

These tests exercise the project's own generator, so what they can show is limited: that it is
deterministic, that its files hold what it says, that its truth is a large-sample quantity
(stable across seeds within Monte-Carlo error) and that its data carry confounding. The outside
facts they rest on are named beside each check.
"""

from __future__ import annotations

import hashlib
import json
import math
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from emulant.protocol import load_protocol
from synthetic_cohort import generate as G
from synthetic_cohort import rules
from synthetic_cohort.records import NONE, read_tables

ROOT = Path(__file__).resolve().parents[1]
N = 4000
SEED = 20261201


def _hashes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def extract(tmp_path_factory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("synth") / "a"
    return out, G.write_synthetic(out, persons=N, seed=SEED)


def test_same_seed_same_file_hashes(extract, tmp_path):
    # Determinism: the same seed must give byte-identical files (SHA-256 of every file).
    out, _ = extract
    G.write_synthetic(tmp_path, persons=N, seed=SEED)
    assert _hashes(out) == _hashes(tmp_path)
    assert {"persons.parquet", "coverage.parquet", "dispensings.parquet", "diagnoses.parquet",
            "measurements.parquet", "deaths.parquet", "protocol.yaml", "truth.json",
            "codelists/kestrel.csv"} <= set(_hashes(out))


def test_rewrite_leaves_identical_files_untouched(tmp_path):
    G.write_synthetic(tmp_path, persons=500, seed=7)
    before = {p: p.stat().st_mtime_ns for p in tmp_path.rglob("*") if p.is_file()}
    G.write_synthetic(tmp_path, persons=500, seed=7)
    after = {p: p.stat().st_mtime_ns for p in tmp_path.rglob("*") if p.is_file()}
    assert before == after
    G.write_synthetic(tmp_path, persons=500, seed=8)  # a new seed rewrites the data files
    changed = {p for p in before if p.stat().st_mtime_ns != before[p]}
    assert tmp_path / "persons.parquet" in changed and tmp_path / "truth.json" in changed
    assert tmp_path / "protocol.yaml" not in changed
    assert not list(tmp_path.glob(".*tmp"))  # no temporary file left behind


def test_csv_format_holds_the_same_rows(extract, tmp_path):
    out, truth = extract
    assert G.write_synthetic(tmp_path, persons=N, seed=SEED, fmt="csv") == truth
    for name in G.TABLES:
        a = pd.read_parquet(out / f"{name}.parquet").astype(str)
        b = pd.read_csv(tmp_path / f"{name}.csv", dtype=str, keep_default_na=False)
        a = a.replace({"nan": "", "None": ""})
        if "value" in a:  # the CSV writer prints 140.0 as 140
            a["value"] = a["value"].astype(float).map(repr)
            b["value"] = b["value"].astype(float).map(repr)
        assert list(a.columns) == list(b.columns), name
        pd.testing.assert_frame_equal(a.reset_index(drop=True), b, check_dtype=False, obj=name)
    # switching format in the same folder leaves one file per table
    G.write_synthetic(tmp_path, persons=N, seed=SEED, fmt="parquet")
    assert not list(tmp_path.glob("*.csv"))


def test_bad_arguments_raise_named_errors(tmp_path):
    with pytest.raises(G.SynthError, match="format"):
        G.write_synthetic(tmp_path, persons=10, fmt="xlsx")
    with pytest.raises(G.SynthError, match="persons"):
        G.write_synthetic(tmp_path, persons=0)


def test_written_files_give_the_truths_cohort(extract):
    # The truth's counts come from the in-memory arrays; re-derive them from the files as
    # written (Parquet read back with pandas), with the protocol file as written.
    out, truth = extract
    protocol = load_protocol(out / "protocol.yaml")
    assert protocol.study.id == truth["protocol_study_id"]
    cohort = rules.eligibility(read_tables(out), protocol)
    assert int(cohort.eligible.sum()) == truth["eligible"]["n"]
    by_arm = {a.name: int((cohort.arm[cohort.eligible] == i).sum())
              for i, a in enumerate(protocol.strategies.arms)}
    assert by_arm == truth["eligible"]["by_arm"]
    assert [[s, r] for s, r in cohort.attrition] == [[d["step"], d["remaining"]]
                                                      for d in truth["attrition"]]
    # every eligibility step excludes someone: each kind of ineligible person is present
    remaining = [r for _, r in cohort.attrition]
    assert all(b < a for a, b in zip(remaining, remaining[1:], strict=False))


def test_rules_on_hand_made_boundaries():
    # Hand computation: born 1980-03-15, time zero 2020-03-14 -> 39 completed years; on
    # 2020-03-15 -> 40. Coverage 2019-01-01..2019-06-30 and 2019-07-01..2020-12-31 touch (merge);
    # with a start on 2019-07-02 they do not.
    d = rules.days_since_epoch
    assert list(rules.completed_years(np.array([d("1980-03-15")] * 2),
                                      np.array([d("2020-03-14"), d("2020-03-15")]))) == [39, 40]
    from synthetic_cohort.records import Table

    for second_start, merged in (("2019-07-01", 1), ("2019-07-02", 2)):
        cov = Table({"person_id": np.array([0, 0]),
                     "start_date": np.array([d("2019-01-01"), d(second_start)]),
                     "end_date": np.array([d("2019-06-30"), d("2020-12-31")])})
        assert len(rules.merged_coverage(cov)[0]) == merged


def test_no_records_after_death_in_the_cohort(extract):
    out, _ = extract
    protocol = load_protocol(out / "protocol.yaml")
    t = read_tables(out)
    cohort = rules.eligibility(t, protocol)
    el = cohort.eligible
    for name, tab in t.events.items():
        p = tab.cols["person_id"]
        bad = el[p] & (tab.cols["date"] > t.death[p])
        assert not bad.any(), name
    # outcome events fall on day >= 1 (day 0 is baseline)
    rows = rules.concept_rows(t, protocol.concept("hf_admission"))
    p = rows.cols["person_id"]
    k = rows.cols["date"] - cohort.t0[p]
    assert not np.any(el[p] & (k == 0))


def _flat_risks(truth: dict):
    for outcome, by_est in truth["time_to_event"].items():
        for est, d in by_est.items():
            for arm, by_h in d["risk"].items():
                for h, r in by_h.items():
                    yield (outcome, est, arm, h), r


def test_truth_is_stable_across_seeds(extract, tmp_path):
    # Each true risk is a mean over eligible persons of per-person risks p_i in [0, 1]; their
    # variance is at most mu(1 - mu) (Bhatia & Davis, Amer. Math. Monthly 107 (2000) 353-357,
    # from memory; the binomial variance is the same bound), so two seeds' risks differ by
    # less than 4 * sqrt(mu(1 - mu) (1/n1 + 1/n2)) except with negligible probability
    # (normal approximation; 4 SE is common practice, no single source).
    _, t1 = extract
    t2 = G.write_synthetic(tmp_path, persons=N, seed=SEED + 1)
    n = {"ATE": (t1["eligible"]["n"], t2["eligible"]["n"]),
         "ATT": (t1["eligible"]["by_arm"]["kestrel"], t2["eligible"]["by_arm"]["kestrel"])}
    r2 = dict(_flat_risks(t2))
    for key, r in _flat_risks(t1):
        n1, n2 = n[key[1]]
        mu = (r + r2[key]) / 2
        tol = 4 * math.sqrt(mu * (1 - mu) * (1 / n1 + 1 / n2))
        assert abs(r - r2[key]) < tol, (key, r, r2[key], tol)
    assert t1 != t2  # the two seeds are different draws
    # the negative control is unaffected by the arms: its true contrast is exactly null
    for est in ("ATE", "ATT"):
        assert all(v == 0 for v in t1["time_to_event"]["lens_opacity"][est]["risk_difference"].values())
        assert t1["measured"]["marker"][est]["mean_difference"] == pytest.approx(-4.0)
    # staying on kestrel rather than plover: the conditional hazard ratio settles at
    # 0.75 * exp(0.09 * (43 - 46)) = 0.57 in women and 1.05 * exp(0.09 * (43 - 46)) = 0.80 in
    # men as the tones reach their targets (synthetic_cohort README); starting from the same
    # tone, the 1095-day per-protocol risk ratio lies between those and 1 (rare events)
    rr = t1["per_protocol"]["hf_admission"]["ATE"]["risk_ratio"]["1095"]
    assert 0.6 < rr < 0.85
    rr_sex = {s: t1["subgroups_per_protocol"][f"sex={s}"]["hf_admission"]["ATE"]["risk_ratio"]["1095"]
              for s in "FM"}
    assert 0.57 < rr_sex["F"] < rr < rr_sex["M"] < 1


def _crude(folder: Path, outcome: str, horizon: int) -> tuple[float, float]:
    """Unadjusted Aalen-Johansen risk difference kestrel - plover at a horizon, and its SE.

    The reference estimator is lifelines' AalenJohansenFitter (outside library) with its own
    variance; follow-up comes from the independent rules module.
    """
    from lifelines import AalenJohansenFitter

    protocol = load_protocol(folder / "protocol.yaml")
    t = rules.plausible(read_tables(folder))
    cohort = rules.eligibility(t, protocol)
    t0 = np.where(cohort.eligible, cohort.t0, NONE)
    end, reason = rules.follow_up(t, protocol, outcome, t0)
    risk, var = {}, {}
    for i, arm in enumerate(protocol.strategies.arm_names):
        m = cohort.eligible & (cohort.arm == i)
        event = np.select([reason[m] == 0, reason[m] == 1], [1, 2], 0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            aj = AalenJohansenFitter(calculate_variance=True, seed=0).fit(
                end[m], event, event_of_interest=1)
        cif = aj.cumulative_density_.iloc[:, 0]
        risk[arm] = float(cif[cif.index <= horizon].iloc[-1])
        v = aj.variance_
        v = v.iloc[:, 0] if v.ndim == 2 else v
        var[arm] = float(v[v.index <= horizon].iloc[-1])
    return risk["kestrel"] - risk["plover"], math.sqrt(var["kestrel"] + var["plover"])


def test_unadjusted_comparison_is_confounded(tmp_path):
    # Confounding by indication: the crude risk difference is far (> 4 SE) from the true ATE,
    # for the primary outcome and for the negative control (whose true difference is 0).
    truth = G.write_synthetic(tmp_path, persons=12000, seed=11)
    for outcome in ("hf_admission", "lens_opacity"):
        crude, se = _crude(tmp_path, outcome, 730)
        true = truth["time_to_event"][outcome]["ATE"]["risk_difference"]["730"]
        assert abs(crude - true) > 4 * se, (outcome, crude, true, se)
    # the measured outcome: crude difference of observed means vs the true -4.0 (Welch SE)
    protocol = load_protocol(tmp_path / "protocol.yaml")
    t = rules.plausible(read_tables(tmp_path))
    cohort = rules.eligibility(t, protocol)
    y = rules.measured_outcome(t, protocol, protocol.outcomes.measured()[0],
                               np.where(cohort.eligible, cohort.t0, NONE))
    ya = [y[cohort.eligible & (cohort.arm == i) & ~np.isnan(y)] for i in (0, 1)]
    diff = ya[0].mean() - ya[1].mean()
    se = math.sqrt(sum(v.var(ddof=1) / len(v) for v in ya))
    assert abs(diff - truth["measured"]["marker"]["ATE"]["mean_difference"]) > 4 * se
    assert 0.4 < np.mean(~np.isnan(y[cohort.eligible])) < 0.95  # some outcome values missing


def _content(protocol) -> dict:
    d = protocol.as_dict()
    for k in ("path", "sha256"):
        d.pop(k)
    for c in d["concepts"].values():
        c.pop("codes_file")
    return d


def test_committed_config_agrees_with_the_template(extract):
    template = G.demo_protocol()
    committed = load_protocol(ROOT / "config" / "protocols" / "demo.yaml")
    written = load_protocol(extract[0] / "protocol.yaml")
    assert _content(committed) == _content(template) == _content(written)
    assert (ROOT / "config" / "protocols" / "demo.yaml").read_text() == G.config_protocol_text()
    for f in G.CODELISTS.glob("*.csv"):
        assert (ROOT / "config" / "codelists" / f.name).read_bytes() == f.read_bytes()


def test_truth_schema(extract):
    _, truth = extract
    assert json.loads((extract[0] / "truth.json").read_text()) == truth
    assert {"seed", "persons", "protocol_study_id", "eligible", "time_to_event", "measured",
            "description"} <= set(truth)
    d = truth["time_to_event"]["hf_admission"]["ATT"]
    assert set(d["risk"]) == {"kestrel", "plover"} and set(d["risk"]["kestrel"]) == {
        "365", "730", "1095"}
    assert d["risk_difference"]["365"] == pytest.approx(
        d["risk"]["kestrel"]["365"] - d["risk"]["plover"]["365"])
