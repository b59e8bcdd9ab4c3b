"""Property tests: random small extracts, every person re-checked against CONTRACTS §3a by an
independent pandas/Python implementation written here (a second reading of the contract, person
by person, with no SQL), plus the synthetic generator's eligible counts.
"""

from __future__ import annotations

import datetime as dt
import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_cohort import COLUMNS

from emulant.cohort import CohortError, build_cohort
from emulant.extract import open_extract
from emulant.protocol import parse_protocol

ORIGIN = dt.date(2018, 1, 1)
DISP_CODES = ["RXA1", "RXA", "RXB1", "RXB10", "RXC1"]
DIAG_CODES = ["DM2", "HF5", "HF59", "HF6", "HF5", "MI1"]
STEPS = ["same_day", "age", "coverage_before", "washout", "require:t2d", "exclude:mi"]


def day(k: int) -> dt.date:
    return ORIGIN + dt.timedelta(days=k)


def offsets(lo: int, hi: int, edges: list[int]):
    """Days in [lo, hi], half of the time one of the rule's edges (so ties and ends come up)."""
    return st.one_of(st.sampled_from(edges), st.integers(lo, hi))


@st.composite
def scenarios(draw):
    """A handful of persons whose records cluster around their first dispensing inside the entry
    window, so most examples reach every step and both arms; the protocol's numbers are drawn
    too, and the edges (days -1/0/1, window ends) come up often because offsets are small."""
    entry = (draw(st.integers(-100, 0)), draw(st.integers(0, 300)))
    req = draw(st.sampled_from([-400, -365, -30, 0]))
    par = {
        "entry": entry, "age_min": draw(st.sampled_from([None, None, 57, 58])),
        "age_max": draw(st.sampled_from([None, None, 58, 59])),
        "cbd": draw(st.sampled_from([0, 30, 365])), "washout": draw(st.sampled_from([0, 30, 90])),
        "req": (req, draw(st.integers(max(req, -5), 0))), "exc": (draw(st.integers(-300, 0)), 0),
        "same_day": draw(st.sampled_from(["exclude", "first_listed"])),
        "max_days": draw(st.integers(30, 400)), "admin": draw(st.integers(300, 700)),
    }
    n = draw(st.integers(4, 12))
    near = offsets(-120, 120, [-101, -100, -1, 0, 1, 2])
    persons, cov, disp, diag, meas, deaths = [], [], [], [], [], []
    for pid in range(1, n + 1):
        t = draw(st.integers(*entry)) + draw(st.sampled_from([0, 0, 0, 0, 0, -1, 1, -150]))
        t0, years = day(t), draw(st.sampled_from([57, 58, 58, 58, 59, 60]))
        birth = (t0.replace(year=t0.year - years, day=min(t0.day, 28))
                 - dt.timedelta(days=draw(offsets(-300, 300, [-1, 0, 1]))))
        if draw(st.integers(0, 9)) == 0:
            birth = dt.date(1960, 2, 29)
        persons.append((pid, birth.isoformat(), draw(st.sampled_from("FM"))))
        if draw(st.integers(0, 9)):  # one long period, often split by no gap, one day or more
            g, gap = draw(st.sampled_from([-200, -1, 0, 50])), draw(st.sampled_from([0, 1, 2]))
            end = t + draw(st.integers(0, 500))
            if draw(st.booleans()):
                cov.append((pid, day(t - 400).isoformat(), day(t + g).isoformat()))
                cov.append((pid, day(t + g + 1 + gap).isoformat(),
                            day(max(end, t + g + 5)).isoformat()))
            else:
                cov.append((pid, day(t - 400).isoformat(), day(end).isoformat()))
        for _ in range(draw(st.integers(0, 2))):
            s = t + draw(st.integers(-500, 200))
            cov.append((pid, day(s).isoformat(), day(s + draw(st.integers(0, 400))).isoformat()))
        first = draw(st.sampled_from(["RXA1", "RXB1", "RXA", "RXB1"]))
        disp.append((pid, day(t).isoformat(), first))
        for _ in range(draw(st.integers(0, 2))):
            disp.append((pid, day(t + draw(st.sampled_from([0, 0, 1, -1, -30, -31, -90, -91, 40])))
                         .isoformat(), draw(st.sampled_from(DISP_CODES))))
        if draw(st.integers(0, 9)):
            diag.append((pid, day(t - draw(offsets(0, 400, [0, 1, 29, 30, 31]))).isoformat(), "DM2",
                         "outpatient"))
        for _ in range(draw(st.integers(0, 3))):
            diag.append((pid, day(t + draw(near)).isoformat(), draw(st.sampled_from(DIAG_CODES)),
                         draw(st.sampled_from(["inpatient", "outpatient"]))))
        for _ in range(draw(st.integers(0, 3))):
            k = t + draw(offsets(-110, 40, [-101, -100, -1, 0, 0, 0, 10, 20, 20, 30, 31]))
            meas.append((pid, day(k).isoformat(), "LAB7",
                         draw(st.integers(1, 4))))
        if draw(st.booleans()):  # two values on one day: the tie rules of last and nearest
            k = t + draw(st.sampled_from([-100, -1, 0, 20]))
            pair = draw(st.sampled_from([(1, 3), (4, 2)]))
            meas += [(pid, day(k).isoformat(), "LAB7", v) for v in pair]
        if draw(st.integers(0, 4)) == 0:
            deaths.append((pid, day(t + draw(offsets(-5, 300, [0, 1, 2, 30]))).isoformat()))
    if draw(st.integers(0, 6)):  # usually two anchors who pass every step, one per arm
        for pid, code in ((n + 1, "RXA1"), (n + 2, "RXB1")):
            t0 = day(entry[0])
            birth = t0.replace(year=t0.year - 58, day=min(t0.day, 28))
            persons.append((pid, birth.isoformat(), "F"))
            cov.append((pid, day(entry[0] - 400).isoformat(), day(900).isoformat()))
            disp.append((pid, t0.isoformat(), code))
            diag.append((pid, day(entry[0] + req).isoformat(), "DM2", "outpatient"))
    return {"persons": persons, "coverage": cov, "dispensings": disp, "diagnoses": diag,
            "measurements": meas, "deaths": deaths}, par


def protocol_dict(par) -> dict:
    return {
        "study": {"id": "prop"},
        "concepts": {"a": {"source": "dispensings", "codes": ["RXA"]},
                     "b": {"source": "dispensings", "codes": ["RXB1"], "match": "exact"},
                     "t2d": {"source": "diagnoses", "codes": ["DM2"]},
                     "mi": {"source": "diagnoses", "codes": ["MI1"]},
                     "hf": {"source": "diagnoses", "codes": ["HF5"],
                            "where": {"setting": "inpatient"}},
                     "lab": {"source": "measurements", "codes": ["LAB7"]}},
        "eligibility": {"entry": {"start": day(par["entry"][0]).isoformat(),
                                  "end": day(par["entry"][1]).isoformat()},
                        "age": {"min": par["age_min"], "max": par["age_max"]},
                        "coverage_before_days": par["cbd"],
                        "require": [{"concept": "t2d", "window": list(par["req"])}],
                        "exclude": [{"concept": "mi", "window": list(par["exc"])}]},
        "strategies": {"arms": {"arm_a": {"initiate": "a"}, "arm_b": {"initiate": "b"}},
                       "treated": "arm_b", "washout_days": par["washout"],
                       "same_day": par["same_day"]},
        "follow_up": {"max_days": max(par["max_days"], 30),
                      "administrative_end": day(par["admin"]).isoformat()},
        "outcomes": {"primary": "hf", "competing": ["death"],
                     "secondary": [{"measure": "lab", "at_day": 20, "tolerance_days": 10}]},
        "covariates": [{"name": "age", "builtin": "age"},
                       {"name": "prior_mi", "concept": "mi", "window": [-365, -1],
                        "summary": "any"},
                       {"name": "n_dx", "source": "diagnoses", "window": [-100, 0],
                        "summary": "count"},
                       {"name": "n_codes", "source": "diagnoses", "window": [-100, 0],
                        "summary": "distinct_codes"},
                       {"name": "lab_last", "concept": "lab", "window": [-100, 0],
                        "summary": "last"}],
        "analysis": {"horizons_days": [30]},
    }


TYPES = {"person_id": pa.int64(), "value": pa.float64(), "birth_date": pa.date32(),
         "start_date": pa.date32(), "end_date": pa.date32(), "date": pa.date32()}


def write_parquet(folder: Path, **tables: list[tuple]) -> Path:
    """Each table as Parquet with contract types (faster to open than CSV, so more examples)."""
    folder.mkdir(parents=True)
    for name, rows in tables.items():
        cols = _cols(name)
        data = {c: [r[i] for r in rows] for i, c in enumerate(cols)}
        for c, v in data.items():
            if TYPES.get(c) == pa.date32():
                data[c] = [dt.date.fromisoformat(x) for x in v]
        schema = pa.schema([(c, TYPES.get(c, pa.string())) for c in cols])
        pq.write_table(pa.table(data, schema=schema), folder / f"{name}.parquet")
    return folder


# ----------------------------------------------------------------------------- the reference


def _age(b: dt.date, t0: dt.date) -> int:
    return t0.year - b.year - ((t0.month, t0.day) < (b.month, b.day))


def _merged(periods: list[tuple[dt.date, dt.date]]) -> list[list[dt.date]]:
    out: list[list[dt.date]] = []
    for s, e in sorted(periods):
        if out and s <= out[-1][1] + dt.timedelta(days=1):
            out[-1][1] = max(out[-1][1], e)
        else:
            out.append([s, e])
    return out


def reference(data, par) -> dict[int, dict]:
    """Per person: ``step`` (the first failed, or None) and, for members, the expected values."""
    tab = {k: pd.DataFrame(v, columns=_cols(k)) for k, v in data.items()}
    for k in tab:
        for c in ("birth_date", "start_date", "end_date", "date"):
            if c in tab[k]:
                tab[k][c] = pd.to_datetime(tab[k][c]).dt.date
    death = dict(zip(tab["deaths"].person_id, tab["deaths"].date, strict=True))
    birth = dict(zip(tab["persons"].person_id, tab["persons"].birth_date, strict=True))
    ev = {}
    for k in ("dispensings", "diagnoses", "measurements"):
        t = tab[k]
        ok = [birth[p] <= d and (p not in death or d <= death[p])
              for p, d in zip(t.person_id, t.date, strict=True)]
        ev[k] = t[pd.Series(ok, index=t.index, dtype=bool)]
    es, ee = day(par["entry"][0]), day(par["entry"][1])
    out = {}
    for pid in tab["persons"].person_id:
        d = ev["dispensings"][ev["dispensings"].person_id == pid]
        a = d[d.code.str.startswith("RXA")]
        b = d[d.code == "RXB1"]
        dates = [x for x in list(a.date) + list(b.date) if es <= x <= ee]
        if not dates:
            out[pid] = {"step": "initiated"}
            continue
        t0 = min(dates)
        on_a, on_b = t0 in set(a.date), t0 in set(b.date)
        r = {"t0": t0, "arm": "arm_a" if on_a else "arm_b", "both": on_a and on_b, "a0": on_a,
             "b0": on_b}

        def k_of(x, t0=t0):
            return (x - t0).days

        dx = ev["diagnoses"][ev["diagnoses"].person_id == pid].assign(k=lambda f: f.date.map(k_of))
        ms = ev["measurements"][ev["measurements"].person_id == pid]
        ms = ms.assign(k=lambda f: f.date.map(k_of))
        age = _age(birth[pid], t0)
        periods = _merged(list(zip(*[tab["coverage"][tab["coverage"].person_id == pid][c]
                                     for c in ("start_date", "end_date")], strict=True)))
        hold = [p for p in periods if p[0] <= t0 <= p[1]]
        arm_k = [k_of(x) for x in list(a.date) + list(b.date)]
        w, (r0, r1), (x0, x1) = par["washout"], par["req"], par["exc"]
        fails = [
            r["both"] and par["same_day"] == "exclude",
            (par["age_min"] is not None and age < par["age_min"])
            or (par["age_max"] is not None and age > par["age_max"]),
            not hold or k_of(hold[0][0]) > -par["cbd"],
            any(-w <= k <= -1 for k in arm_k),
            not ((dx.code.str.startswith("DM2")) & dx.k.between(r0, r1)).any(),
            ((dx.code.str.startswith("MI1")) & dx.k.between(x0, x1)).any(),
        ]
        r["step"] = next((s for s, f in zip(STEPS, fails, strict=True) if f), None)
        if r["step"] is None:
            r.update(_values(r, dx, ms, age, hold, death.get(pid), par))
        out[pid] = r
    return out


def _values(r, dx, ms, age, hold, death, par) -> dict:
    t0 = r["t0"]
    hf = dx[dx.code.str.startswith("HF5") & (dx.setting == "inpatient") & (dx.k >= 1)].k
    cands = [("outcome", hf.min() if len(hf) else None)]
    dk = (death - t0).days if death is not None else None
    cands.append(("competing", dk if dk is not None and dk >= 0 else None))
    cands.append(("administrative_end", (day(par["admin"]) - t0).days))
    cands.append(("max_follow_up", max(par["max_days"], 30)))
    cands.append(("coverage_end", (hold[0][1] - t0).days))  # last on a tie (CONTRACTS §3a)
    end = min(v for _, v in cands if v is not None)
    reason = next(n for n, v in cands if v == end)
    win = dx[dx.k.between(-100, 0)]
    lab = ms[ms.k.between(-100, 0)].sort_values(["k", "value"])
    near = ms[ms.k.between(10, 30)].assign(dist=lambda f: (f.k - 20).abs(), neg=lambda f: -f.value)
    near = near.sort_values(["dist", "k", "neg"])
    return {"end_day": end, "end_reason": reason, "age": age,
            "prior_mi": int((dx.code.str.startswith("MI1") & dx.k.between(-365, -1)).any()),
            "n_dx": len(win), "n_codes": win.code.nunique(),
            "lab_last": float(lab.value.iloc[-1]) if len(lab) else math.nan,
            "lab_value": float(near.value.iloc[0]) if len(near) else math.nan,
            "coverage_end_day": (hold[0][1] - t0).days}


def _cols(k):
    return COLUMNS[k].split(",")[: 3 if k == "persons" else None]


def expected_attrition(ref: dict[int, dict]) -> tuple[list[int], dict[str, list[int]]]:
    n = len(ref)
    init = [r for r in ref.values() if r["step"] != "initiated"]
    rem = [n, len(init)]
    arms = {"arm_a": [n, sum(r["a0"] for r in init)], "arm_b": [n, sum(r["b0"] for r in init)]}
    for k in range(len(STEPS)):
        left = [r for r in init if r["step"] is None or STEPS.index(r["step"]) > k]
        rem.append(len(left))
        for arm in arms:
            arms[arm].append(sum(r["arm"] == arm for r in left))
    return rem, arms


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scenarios())
def test_every_person_against_reference(scenario):
    data, par = scenario
    with tempfile.TemporaryDirectory() as tmp:
        folder = write_parquet(Path(tmp) / "x", **data)
        protocol = parse_protocol(protocol_dict(par), tmp)
        ref = reference(data, par)
        rem, arms = expected_attrition(ref)
        names = ["persons", "initiated", *STEPS]
        error = None
        if rem[-1] == 0:
            error = names[rem.index(0)]
        else:
            for arm in ("arm_a", "arm_b"):
                if arms[arm][-1] == 0:
                    error = names[arms[arm].index(0)]
                    break
        ex = open_extract(folder, protocol, {"threads": 1})
        if error:
            with pytest.raises(CohortError) as info:
                build_cohort(ex, protocol)
            assert info.value.step == error
            return
        res = build_cohort(ex, protocol)
    assert res.attrition.step.tolist() == names
    assert res.attrition.remaining.tolist() == rem
    c = res.cohort.assign(pid=res.cohort.person_id.astype(int)).set_index("pid")
    members = sorted(p for p, r in ref.items() if r["step"] is None)
    assert list(c.index) == members
    lab_known = [ref[p]["lab_last"] for p in members if not math.isnan(ref[p]["lab_last"])]
    median = float(pd.Series(lab_known).median()) if lab_known else 0.0
    for p in members:
        r, got = ref[p], c.loc[p]
        assert got.arm == r["arm"] and got.treated == int(r["arm"] == "arm_b")
        assert got.time_zero.date() == r["t0"]
        assert (got.end_day, got.end_reason) == (r["end_day"], r["end_reason"]), p
        for k in ("age", "prior_mi", "n_dx", "n_codes", "coverage_end_day"):
            assert got[k] == r[k], (p, k)
        missing = math.isnan(r["lab_last"])
        assert got.lab_last_missing == int(missing)
        assert got.lab_last == pytest.approx(median if missing else r["lab_last"])
        if math.isnan(r["lab_value"]):
            assert math.isnan(got.value__lab) and got.measured__lab == 0
        else:
            assert got.value__lab == r["lab_value"] and got.measured__lab == 1


def test_synthetic_eligible_counts_equal_the_generator(tmp_path):
    """The generator decides eligibility person by person in its own code (numpy, no SQL); the
    cohort's counts per arm and per step must equal its truth on a 5,000-person extract."""
    gen = pytest.importorskip("synthetic_cohort.generate")
    from emulant.protocol import load_protocol

    truth = gen.write_synthetic(tmp_path, 5000, 7, "parquet")
    protocol = load_protocol(tmp_path / "protocol.yaml")
    res = build_cohort(open_extract(tmp_path, protocol, {"threads": 2}), protocol)
    counts = res.cohort.arm.value_counts().to_dict()
    assert counts == {k: int(v) for k, v in truth["eligible"]["by_arm"].items()}
    assert len(res.cohort) == truth["eligible"]["n"]
    if "attrition" in truth:  # the generator's own step counts, step by step
        want = [(r["step"], int(r["remaining"])) for r in truth["attrition"]]
        assert list(zip(res.attrition.step, res.attrition.remaining, strict=True)) == want


def test_synthetic_follow_up_ends_agree_person_by_person(tmp_path):
    """A data cut-off equal to the administrative end: coverage still open on the last day of
    the extract ends there, which is the planned end of follow-up, not censoring (CONTRACTS §3a,
    ties: outcome, competing, administrative_end, max_follow_up, coverage_end). The generator's
    own numpy reading (synthetic_cohort.rules) and the cohort SQL agree person by person."""
    gen = pytest.importorskip("synthetic_cohort.generate")
    import yaml

    from emulant.protocol import load_protocol
    from synthetic_cohort import params as P
    from synthetic_cohort import rules
    from synthetic_cohort.records import NONE, read_tables

    gen.write_synthetic(tmp_path, 3000, 5, "parquet")
    d = yaml.safe_load((tmp_path / "protocol.yaml").read_text())
    d["follow_up"]["administrative_end"] = (P.EPOCH + dt.timedelta(days=int(P.DATA_END))).isoformat()
    (tmp_path / "cutoff.yaml").write_text(yaml.safe_dump(d, sort_keys=False))
    protocol = load_protocol(tmp_path / "cutoff.yaml")
    cohort = build_cohort(open_extract(tmp_path, protocol, {"threads": 2}), protocol).cohort
    t = rules.plausible(read_tables(tmp_path))
    ref = rules.eligibility(t, protocol)
    end, reason = rules.follow_up(t, protocol, "hf_admission",
                                  np.where(ref.eligible, ref.t0, NONE))
    ids = pd.read_parquet(tmp_path / "persons.parquet")["person_id"].astype(str).to_numpy()
    want = {ids[i]: (int(end[i]), rules.REASONS[reason[i]]) for i in np.flatnonzero(ref.eligible)}
    got = {str(p): (int(e), r) for p, e, r in zip(cohort.person_id, cohort.end_day,
                                                  cohort.end_reason, strict=True)}
    assert got == want
    # the ties are there: persons whose coverage ran to the cut-off end as administrative_end
    planned = np.minimum((pd.Timestamp(protocol.follow_up.administrative_end)
                          - pd.to_datetime(cohort.time_zero)).dt.days, protocol.follow_up.max_days)
    tied = cohort[(cohort.coverage_end_day == planned) & (cohort.end_day == planned)]
    assert len(tied) > 100
    assert set(tied.end_reason) <= {"outcome", "competing", "administrative_end", "max_follow_up"}
    assert (tied.end_reason == "administrative_end").sum() > 100
