"""The workflow through a real SLURM: every job submitted by sbatch, the same estimates as locally.

Marked ``cluster`` and left out of ``make test``; ``make test-cluster`` runs it (and ``.ci/run``
after ``make test``). It starts a single-node SLURM with ``cluster/single-node-slurm.sh`` and
skips, saying why, only where SLURM cannot start (not root, slurm-wlm or munge not installed).
Snakemake's SLURM executor (snakemake-executor-plugin-slurm) submits each job with ``sbatch``
and, with ``--slurm-keep-successful-logs``, keeps one SLURM log per job under
``.snakemake/slurm_logs/rule_<rule>/`` (the plugin's documented layout).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
SNAKEFILE = ROOT / "Snakefile"
PROFILE = ROOT / "workflow" / "profiles" / "slurm"
START = ROOT / "cluster" / "single-node-slurm.sh"
pytestmark = pytest.mark.cluster


@pytest.fixture(scope="module")
def slurm_env() -> Iterator[dict[str, str]]:
    run = subprocess.run(["bash", str(START), "start"], capture_output=True, text=True, timeout=180)
    if run.returncode == 3:
        pytest.skip(run.stderr.strip())
    assert run.returncode == 0, run.stderr
    conf = run.stdout.strip().rsplit("=", 1)[-1]
    yield {**os.environ, "SLURM_CONF": conf}
    # stop the daemons this test started; a failure to stop them is no failure of the test
    subprocess.run(["bash", str(START), "stop"], capture_output=True, text=True, timeout=120,
                   check=False)


def _workdir(tmp: Path) -> Path:
    shutil.copytree(ROOT / "config", tmp / "config")
    cfg = yaml.safe_load((tmp / "config" / "config.yaml").read_text())
    cfg["synthetic"] = {"persons": 1500, "seed": 11}
    cfg["bootstrap_chunks"] = 2
    (tmp / "config" / "config.yaml").write_text(yaml.safe_dump(cfg))
    proto_path = tmp / "config" / "protocols" / "demo.yaml"
    proto = yaml.safe_load(proto_path.read_text())
    proto["analysis"]["bootstrap"] = {**proto["analysis"].get("bootstrap", {}), "replicates": 4}
    proto_path.write_text(yaml.safe_dump(proto, sort_keys=False))
    return tmp


def _snakemake(workdir: Path, env: dict[str, str] | None, *args: str) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(SNAKEFILE), "--directory",
           str(workdir), *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=1800, env=env)


def test_the_workflow_runs_through_sbatch_with_the_local_estimates(slurm_env, tmp_path):
    local = _workdir(tmp_path / "local")
    run = _snakemake(local, None, "--cores", "2", "--scheduler", "greedy")
    assert run.returncode == 0, run.stderr[-4000:]
    remote = _workdir(tmp_path / "slurm")
    run = _snakemake(remote, slurm_env, "--profile", str(PROFILE), "--jobs", "4",
                     "--slurm-init-seconds-before-status-checks", "2")  # small jobs: look soon
    assert run.returncode == 0, (run.stdout + run.stderr)[-6000:]
    logs = remote / ".snakemake" / "slurm_logs"
    ran = {p.name.removeprefix("rule_") for p in logs.iterdir() if any(p.rglob("*.log"))}
    assert {"build_cohort", "fit_weights", "estimate_point", "bootstrap_chunk",
            "estimate_effects", "render_report"} <= ran, sorted(ran)
    assert len(list((logs / "rule_bootstrap_chunk").rglob("*.log"))) == 2  # one job per chunk
    study = yaml.safe_load((local / "config" / "protocols" / "demo.yaml").read_text())["study"]["id"]
    for name in ("estimates.csv", "curves.csv", "bootstrap.json"):
        assert (remote / "results" / study / name).read_bytes() == \
            (local / "results" / study / name).read_bytes(), name
