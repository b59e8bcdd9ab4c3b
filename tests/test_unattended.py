"""Unattended runs: `emulant run` (what `make demo` and the README's cron recipe call) survives
`kill -9` at random points with no manual step, and a second run of a busy folder stops at once.

Kill points are drawn with a fixed seed. After each kill the same command is run again; at the end
`estimates.csv` must be byte-identical to an uninterrupted run's, no archive folder may be
half-written and `ledger.jsonl` must hold whole lines only. Snakemake's behaviour after a kill
(a stale lock in .snakemake/locks, incomplete markers, --unlock, --rerun-incomplete) as its
documentation describes it; the statistics are checked elsewhere.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import yaml

from emulant.runner import snakemake_processes

ROOT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.slow


def _workdir(base: Path) -> Path:
    wd = base
    shutil.copytree(ROOT / "config", wd / "config")
    cfg = yaml.safe_load((wd / "config" / "config.yaml").read_text())
    cfg["synthetic"] = {"persons": 1500, "seed": 11}
    (wd / "config" / "config.yaml").write_text(yaml.safe_dump(cfg))
    proto_path = wd / "config" / "protocols" / "demo.yaml"
    proto = yaml.safe_load(proto_path.read_text())
    proto.setdefault("analysis", {})["bootstrap"] = {**proto["analysis"].get("bootstrap", {}), "replicates": 6}
    proto_path.write_text(yaml.safe_dump(proto, sort_keys=False))
    return wd


def _cmd() -> list[str]:
    return [sys.executable, "-m", "emulant.cli", "run", "--snakefile", str(ROOT / "Snakefile"),
            "--cores", "2", "--scheduler", "greedy"]


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH", "")]))
    return env


def _run(wd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(_cmd(), cwd=wd, capture_output=True, text=True, timeout=900, env=_env())


def _study(wd: Path) -> str:
    return yaml.safe_load((wd / "config" / "protocols" / "demo.yaml").read_text())["study"]["id"]


def _script_jobs(wd: Path) -> list[int]:
    """Live rule-script processes of this folder (their command line names a Snakemake script)."""
    out = []
    for proc in Path("/proc").iterdir():
        if not proc.name.isdigit():
            continue
        try:
            cmd = (proc / "cmdline").read_bytes()
            state = (proc / "stat").read_text().rsplit(")", 1)[1].split()[0]
            cwd = (proc / "cwd").resolve()
        except OSError:
            continue
        if state != "Z" and cwd == wd.resolve() and b".snakemake/scripts" in cmd:
            out.append(int(proc.name))
    return out


def test_kill_9_at_random_points_then_rerun(tmp_path):
    ref = _workdir(tmp_path / "reference")
    t0 = time.monotonic()
    first = _run(ref)
    duration = time.monotonic() - t0
    assert first.returncode == 0, first.stderr[-3000:]
    assert f"results/{_study(ref)}" in first.stdout and "report.html" in first.stdout  # where it is

    wd = _workdir(tmp_path / "killed")
    rng = np.random.default_rng(20261202)
    kills = sorted(rng.uniform(0.15, 0.85, size=3) * duration)
    for i, at in enumerate(kills):
        proc = subprocess.Popen(_cmd(), cwd=wd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                env=_env(), start_new_session=True)
        time.sleep(at)
        if i == len(kills) - 1:  # a power cut: the runner, Snakemake and every job at once
            for pid in snakemake_processes(wd):
                os.killpg(pid, signal.SIGKILL)  # Snakemake runs in a process group of its own
            os.killpg(proc.pid, signal.SIGKILL)
        else:  # Snakemake alone (e.g. the out-of-memory killer); its jobs must stop by themselves
            for pid in snakemake_processes(wd):
                os.kill(pid, signal.SIGKILL)
        proc.wait(timeout=60)
        deadline = time.monotonic() + 15
        while (_script_jobs(wd) or snakemake_processes(wd)) and time.monotonic() < deadline:
            time.sleep(0.5)
        assert not _script_jobs(wd), f"rule scripts still running 15 s after kill {i}"
        assert not snakemake_processes(wd), f"Snakemake still running 15 s after kill {i}"

    assert list((wd / ".snakemake" / "locks").glob("*")), "the power cut left no Snakemake lock"
    last = _run(wd)  # the documented command, no --unlock or other manual step
    assert last.returncode == 0, last.stderr[-3000:]
    assert "stale lock" in last.stderr
    study = _study(wd)
    assert ((wd / "results" / study / "estimates.csv").read_bytes()
            == (ref / "results" / study / "estimates.csv").read_bytes())
    reports = wd / "reports" / study
    assert not list(reports.glob(".partial-*"))
    for folder in (p for p in reports.iterdir() if p.is_dir()):
        assert {"report.html", "manifest.json", "estimates.csv"} <= {f.name for f in folder.iterdir()}, folder
    text = (reports / "ledger.jsonl").read_text()
    assert text.endswith("\n")
    entries = [json.loads(line) for line in text.splitlines()]  # whole lines only
    assert all((reports / e["report"]).is_file() for e in entries)


def test_second_run_of_a_busy_folder_stops_at_once(tmp_path):
    wd = _workdir(tmp_path / "busy")
    first = subprocess.Popen(_cmd(), cwd=wd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                             env=_env(), start_new_session=True)
    try:
        deadline = time.monotonic() + 60
        while not snakemake_processes(wd) and time.monotonic() < deadline:
            time.sleep(0.2)
        t0 = time.monotonic()
        second = _run(wd)
        assert second.returncode == 2 and time.monotonic() - t0 < 30
        assert "another run of this folder is alive" in second.stderr
    finally:
        os.killpg(first.pid, signal.SIGTERM)
        first.wait(timeout=120)
