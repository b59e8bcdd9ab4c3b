"""Benchmark: sequential trials, 1,000,000 persons and 24 monthly trials (CONTRACTS §5c).

Reuses the synthetic extract of :mod:`bench.bench_cohort` (written once under ``bench/out/``)
with its demo protocol turned sequential: kestrel against ``initiate: none``, a trial every 30
days from 2018-01-01 (24 trials), intention to treat, the primary outcome only, ``ipw``. Each
run is a fresh child process (its own peak resident set size) going from the extract to the
person-trials (``build_cohort``) and one point estimate (``point_estimate``), with every
non-initiator kept and with ``noninitiator_sample: 0.1``. Prints wall time, person-trials and
peak memory. ``python -m bench.bench_sequential --persons N`` runs a smaller extract.

Measured on the shared 2-core machine under load with ``--persons 100000`` (2,400,000 candidate
person-trials): every non-initiator kept, 1,059,801 person-trials, cohort 31 s, point estimate
30 s, peak 1.9 GiB; ``noninitiator_sample: 0.1``, 120,884 person-trials, cohort 36 s, point
estimate 7 s, peak 1.9 GiB. The 1,000,000-person run was not measured yet.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

import yaml

from bench.bench_cohort import OUT, PERSONS, _peak_gib, ensure_extract

SETTINGS = {"threads": 2, "memory_limit": "4GB", "temp_directory": str(OUT.parent / "duckdb_tmp")}
SHARES = (1.0, 0.1)


def sequential_protocol(folder: Path, share: float) -> Path:
    """The extract's demo protocol as 24 monthly sequential trials of kestrel against none."""
    d = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    d["study"]["id"] = "bench-sequential"
    d["eligibility"]["entry"] = {"start": "2018-01-01", "end": "2019-11-28"}  # t_23 = 2019-11-22
    d["strategies"] = {"design": "sequential", "trial_every_days": 30,
                       "noninitiator_sample": share, "washout_days": 365, "treated": "kestrel",
                       "arms": {"kestrel": {"initiate": "kestrel"},
                                "no_kestrel": {"initiate": "none"}}}
    d["outcomes"] = {"primary": d["outcomes"]["primary"], "competing": ["death"]}
    for key in ("time_varying", "decision", "subgroups"):
        d.pop(key, None)
    d["contrasts"] = ["intention_to_treat"]
    d["analysis"]["methods"] = ["ipw"]
    d["analysis"].pop("primary", None)
    out = folder / f"protocol_sequential_{share:g}.yaml"
    out.write_text(yaml.safe_dump(d, sort_keys=False), encoding="utf-8")
    return out


def _child(folder: Path, share: float) -> dict:
    from emulant.cohort import build_cohort
    from emulant.estimation.effects import point_estimate
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol

    protocol = load_protocol(sequential_protocol(folder, share))
    t0 = time.perf_counter()
    res = build_cohort(open_extract(folder, protocol, SETTINGS), protocol)
    t1 = time.perf_counter()
    point_estimate(res.cohort, protocol)
    c = res.cohort
    return {"cohort_seconds": t1 - t0, "estimate_seconds": time.perf_counter() - t1,
            "candidates": int(res.attrition.remaining.iloc[0]), "person_trials": int(len(c)),
            "initiating": int((c["arm"] == "kestrel").sum()),
            "persons": int(c["person_id"].nunique()), "peak_gib": _peak_gib()}


def run(folder: Path, share: float) -> dict:
    cmd = [sys.executable, "-m", "bench.bench_sequential", "--child", str(folder), str(share)]
    root = Path(__file__).resolve().parent.parent
    done = subprocess.run(cmd, cwd=root, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"share {share} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(persons: int = PERSONS) -> dict:
    folder = OUT if persons == PERSONS else OUT.parent / f"extract_{persons // 1000}k"
    gen = ensure_extract(folder, persons)
    print(f"extract: {persons:,} persons at {folder}" + (f" (written in {gen:.1f} s)" if gen
                                                         else " (reused)"), flush=True)
    out = {}
    for share in SHARES:
        r = out[share] = run(folder, share)
        print(f"noninitiator_sample {share:g}: {r['candidates']:,} candidate person-trials -> "
              f"{r['person_trials']:,} person-trials ({r['initiating']:,} initiating) of "
              f"{r['persons']:,} persons; cohort {r['cohort_seconds']:.1f} s, point estimate "
              f"{r['estimate_seconds']:.1f} s, peak {r['peak_gib']:.2f} GiB", flush=True)
    return out


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        print(json.dumps(_child(Path(sys.argv[2]), float(sys.argv[3]))))
    else:
        ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
        ap.add_argument("--persons", type=int, default=PERSONS)
        main(ap.parse_args().persons)
