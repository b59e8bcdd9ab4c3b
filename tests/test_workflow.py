"""End to end: the Snakemake workflow on a small synthetic extract, in a temporary directory.

Checks the run itself (every results file, the archive, the ledger), that an unchanged rerun has
nothing to do, that a forced rerun archives a second folder with byte-identical estimates, that a
changed extract file reruns from check_extract and is named in "since the previous run", and that
the design target renders a report with no outcome in it. Snakemake behaviour as documented in
its manual (rerun triggers: code, input, mtime, params); the statistics are checked elsewhere.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml

from emulant.report.pdf import find_chromium

ROOT = Path(__file__).resolve().parents[1]
SNAKEFILE = ROOT / "Snakefile"
pytestmark = pytest.mark.slow


def snakemake(workdir: Path, *args: str) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(SNAKEFILE), "--directory", str(workdir),
           "--cores", "2", "--scheduler", "greedy", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=900)


@pytest.fixture(scope="module")
def workdir(tmp_path_factory) -> Path:
    wd = tmp_path_factory.mktemp("flow")
    shutil.copytree(ROOT / "config", wd / "config")
    cfg = yaml.safe_load((wd / "config" / "config.yaml").read_text())
    cfg["synthetic"] = {"persons": 2000, "seed": 7}
    (wd / "config" / "config.yaml").write_text(yaml.safe_dump(cfg))
    proto_path = wd / "config" / "protocols" / "demo.yaml"
    proto = yaml.safe_load(proto_path.read_text())
    proto.setdefault("analysis", {})["bootstrap"] = {**proto["analysis"].get("bootstrap", {}), "replicates": 4}
    proto_path.write_text(yaml.safe_dump(proto, sort_keys=False))
    run = snakemake(wd)
    assert run.returncode == 0, run.stderr[-4000:]
    return wd


def _study(wd: Path) -> str:
    return yaml.safe_load((wd / "config" / "protocols" / "demo.yaml").read_text())["study"]["id"]


def test_first_run_writes_every_result(workdir):
    res = workdir / "results" / _study(workdir)
    for name in ("extract_check.json", "attrition.csv", "cohort.parquet", "weights.parquet", "positivity.json",
                 "balance.csv", "estimates.csv", "curves.csv", "bootstrap.json", "decision.csv", "manifest.json",
                 "report.html", "archive.json"):
        assert (res / name).is_file(), name
    est = pd.read_csv(res / "estimates.csv")
    assert list(est.columns) == ["outcome", "contrast", "estimand", "method", "measure", "horizon_day", "arm",
                                 "comparator", "estimate", "ci_low", "ci_high", "se", "n", "events", "note",
                                 "subgroup"]
    assert {"ATE", "ATT"} <= set(est.estimand.dropna())
    archived = json.loads((res / "archive.json").read_text())
    assert (workdir / "reports" / _study(workdir) / archived["report"]).is_file()  # relative to the ledger
    html = (res / "report.html").read_text()
    for section in ("question", "warnings", "target-trial", "provenance", "attrition", "baseline",
                    "positivity", "results", "assumptions", "manifest"):
        assert f'id="{section}"' in html, section
    # the demo's measured outcome (missing: censor) states the assumption its missing values rest on
    assert "missing at random given arm and the covariates" in html
    # deaths before the measurement day are missing at random too: said, and counted by arm
    assert "as if no one had died before the measurement" in html and "Died before day 365: " in html
    links = re.findall(r'(?:src|href)="([^"]*)"', html)
    assert all(link.startswith("#") for link in links) and "<script" not in html


def test_unchanged_rerun_has_nothing_to_do(workdir):
    dry = snakemake(workdir, "-n")
    assert dry.returncode == 0, dry.stderr[-2000:]
    assert "Nothing to be done" in dry.stdout + dry.stderr


def test_forced_rerun_archives_identical_estimates(workdir):
    reports = workdir / "reports" / _study(workdir)
    before = {p.name for p in reports.iterdir() if p.is_dir()}
    run = snakemake(workdir, "--forcerun", "estimate_point")
    assert run.returncode == 0, run.stderr[-4000:]
    folders = sorted(p for p in reports.iterdir() if p.is_dir() and p.name not in before)
    assert len(folders) == 1
    old = reports / sorted(before)[-1]
    assert (folders[0] / "estimates.csv").read_bytes() == (old / "estimates.csv").read_bytes()
    assert len((reports / "ledger.jsonl").read_text().splitlines()) == len(before) + 1


def test_changed_extract_is_named_in_the_report(workdir):
    deaths = workdir / "resources" / "synthetic" / "deaths.parquet"
    df = pd.read_parquet(deaths)
    df.iloc[:-1].to_parquet(deaths, index=False)  # next month's extract: one death record fewer
    dry = snakemake(workdir, "-n")
    assert "check_extract" in dry.stdout
    run = snakemake(workdir)
    assert run.returncode == 0, run.stderr[-4000:]
    html = (workdir / "results" / _study(workdir) / "report.html").read_text()
    assert "since the previous run" in html.lower()
    assert "deaths" in html


@pytest.mark.skipif(find_chromium() is None, reason="chromium not installed")
def test_demo_report_prints_to_pdf(workdir, tmp_path):
    # emulant pdf on the demo report: a page break before every section (so at least one page
    # per section), page numbers in the margin, and every section heading in the PDF's text
    # (read back with pypdf, an outside PDF reader).
    from pypdf import PdfReader

    html = (workdir / "results" / _study(workdir) / "report.html").read_text()
    out = tmp_path / "report.pdf"
    res = subprocess.run([sys.executable, "-m", "emulant.cli", "pdf",
                          str(workdir / "results" / _study(workdir) / "report.html"),
                          "--out", str(out)], capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr[-2000:]
    pages = PdfReader(out).pages
    headings = re.findall(r'<section id="[^"]+"[^>]*>\s*<h2>([^<]+)</h2>', html)
    assert len(headings) >= 12
    assert len(headings) <= len(pages) <= 160  # 131 with both contrasts (the demo's)
    text = [" ".join(p.extract_text().split()) for p in pages]
    assert text[0].startswith(f"page 1 of {len(pages)}") or f"page 1 of {len(pages)}" in text[0]
    assert f"page {len(pages)} of {len(pages)}" in text[-1]
    whole = " ".join(text)
    for h in headings:
        assert " ".join(h.split()) in whole, h
    assert "At a glance" in text[0]  # the answer on the first page


def test_design_report_holds_no_outcome(workdir):
    run = snakemake(workdir, "design")
    assert run.returncode == 0, run.stderr[-4000:]
    res = workdir / "results" / _study(workdir)
    html = (res / "design" / "report.html").read_text()
    assert 'id="baseline"' in html and 'id="positivity"' in html
    assert 'id="results"' not in html  # no results section, no risk curves, no event counts
    for word in ("Cumulative risk", "Numbers at risk", "E-value", "replicates completed"):
        assert word not in html, word
    archived = json.loads((res / "design_archive.json").read_text())
    assert archived["kind"] == "design"


def test_changing_only_the_chunking_reruns_only_the_bootstrap(workdir):
    # The 4 replicates as 1 chunk (the fixture's default: auto) and then as 3 jobs: only the
    # chunk jobs and the gather step run, and the gathered files are identical byte for byte.
    res = workdir / "results" / _study(workdir)
    names = ("estimates.csv", "curves.csv", "bootstrap.json")
    before = {n: (res / n).read_bytes() for n in names}
    dry = snakemake(workdir, "-n", "--config", "bootstrap_chunks=3")
    jobs = set(re.findall(r"^rule (\w+):", dry.stdout, flags=re.M))
    assert jobs == {"bootstrap_chunk", "estimate_effects"}, dry.stdout[-3000:]
    run = snakemake(workdir, "--config", "bootstrap_chunks=3", "--cores", "1")
    assert run.returncode == 0, run.stderr[-4000:]
    assert {n: (res / n).read_bytes() for n in names} == before
    logs = sorted(p.name for p in (res / "logs").glob("bootstrap_*.log"))
    assert {"bootstrap_000-000.log", "bootstrap_001-001.log", "bootstrap_002-003.log"} <= set(logs)
    chunk_log = (res / "logs" / "bootstrap_002-003.log").read_text()
    assert "bootstrap replicates 2-3 of 0-3: 1/2 (50%)" in chunk_log and "left" in chunk_log
    gather_log = (res / "logs" / "estimate_effects.log").read_text()
    assert "4 of 4 replicates completed, 0 failed, across 3 chunk(s)" in gather_log
