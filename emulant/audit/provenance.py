"""The audit trail: the run manifest, the run stamp, the archive, and the comparison with the previous run.

``REPORTS/<study>/<stamp>/`` keeps every rendered report with its manifest and the results a
reviewer needs to reproduce it; it is never overwritten. ``REPORTS/<study>/ledger.jsonl`` lists
the runs, one JSON line each, append-only.
"""

from __future__ import annotations

import datetime as dt
import difflib
import json
import platform
import shutil
import subprocess
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd

from emulant import __version__
from emulant.extract import sha256_file
from emulant.protocol import Protocol
from emulant.protocol.as_input import as_input

PACKAGES = ("emulant", "snakemake", "duckdb", "pandas", "pyarrow", "numpy", "scipy", "statsmodels",
            "lifelines", "scikit-learn", "jinja2", "matplotlib", "pydantic", "pyyaml")
RESULT_FILES = ("extract_check.json", "attrition.csv", "cohort.parquet", "weights.parquet",
                "positivity.json", "balance.csv", "estimates.csv", "curves.csv", "bootstrap.json",
                "periods.parquet", "decision.csv")
ARCHIVED = ("report.html", "manifest.json", "estimates.csv", "curves.csv", "attrition.csv",
            "balance.csv", "positivity.json", "bootstrap.json", "extract_check.json", "decision.csv")
ESTIMATE_KEY = ["outcome", "contrast", "estimand", "method", "measure", "horizon_day", "arm", "comparator",
                "subgroup"]


def package_versions() -> dict[str, str]:
    out = {}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def code_version() -> str:
    """The package version, with the git commit (and '-dirty') when run from a checkout."""
    here = Path(__file__).resolve().parent
    try:
        commit = subprocess.run(["git", "-C", str(here), "rev-parse", "--short=12", "HEAD"],
                                capture_output=True, text=True, timeout=10, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(here), "status", "--porcelain", "--", "."],
                               capture_output=True, text=True, timeout=10).stdout.strip()
        return f"{__version__}+{commit}{'-dirty' if dirty else ''}"
    except (OSError, subprocess.SubprocessError):
        return __version__


def read_ledger(reports_dir: str | Path) -> list[dict[str, Any]]:
    p = Path(reports_dir) / "ledger.jsonl"
    if not p.is_file():
        return []
    return [json.loads(line) for line in p.read_text(encoding="utf-8").splitlines() if line.strip()]


def new_stamp(reports_dir: str | Path, kind: str = "analysis", now: dt.datetime | None = None) -> str:
    """A UTC time stamp naming a folder that does not exist yet (``-design`` for design runs)."""
    now = now or dt.datetime.now(dt.UTC)
    base = now.strftime("%Y%m%dT%H%M%SZ") + ("-design" if kind == "design" else "")
    taken = {e.get("stamp") for e in read_ledger(reports_dir)}
    stamp, i = base, 1
    while stamp in taken or (Path(reports_dir) / stamp).exists():
        i += 1
        stamp = f"{base}-{i}"
    return stamp


def _iso(ts: float) -> str:
    return dt.datetime.fromtimestamp(ts, dt.UTC).isoformat(timespec="seconds")


def build_manifest(protocol: Protocol, results_dir: str | Path, reports_dir: str | Path,
                   kind: str = "analysis") -> dict[str, Any]:
    """Inputs and their hashes, protocol hash and text, code and package versions, seeds, times."""
    results = Path(results_dir)
    check_path = results / "extract_check.json"
    check = json.loads(check_path.read_text()) if check_path.is_file() else {}
    inputs = [{"table": name, "path": t.get("file"), "sha256": t.get("sha256"), "rows": t.get("rows")}
              for name, t in sorted(check.get("tables", {}).items())]
    for c in protocol.concepts.values():
        if c.codes_file:
            f = Path(c.codes_file)
            f = f if f.is_absolute() else protocol.base_dir / f
            inputs.append({"table": f"codelist:{c.name}", "path": str(f), "sha256": sha256_file(f), "rows": len(c.codes)})
    produced = {name: results / name for name in RESULT_FILES if (results / name).is_file()}
    if kind == "design":
        produced = {k: v for k, v in produced.items()
                    if k not in ("estimates.csv", "curves.csv", "bootstrap.json", "decision.csv")}
    mtimes = {name: p.stat().st_mtime for name, p in produced.items()}
    ledger = [e for e in read_ledger(reports_dir) if e.get("kind", "analysis") == kind]
    b = protocol.analysis.bootstrap
    return {
        "stamp": new_stamp(reports_dir, kind),
        "kind": kind,
        "study_id": protocol.study.id,
        "started": _iso(min(mtimes.values())) if mtimes else None,
        "finished": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "code_version": code_version(),
        "python": platform.python_version(),
        "platform": platform.platform(),
        "packages": package_versions(),
        "protocol": {"path": protocol.path, "sha256": protocol.sha256, "text": protocol.text,
                     "as_parsed": as_input(protocol)},
        "protocol_sha256": protocol.sha256,
        "inputs": inputs,
        "seeds": {"bootstrap_seed": b.seed, "bootstrap_replicates": b.replicates},
        "results": {name: {"sha256": sha256_file(p), "written": _iso(mtimes[name])} for name, p in produced.items()},
        "previous_stamp": ledger[-1]["stamp"] if ledger else None,
    }


def _previous(reports_dir: str | Path, manifest: dict[str, Any]) -> Path | None:
    stamp = manifest.get("previous_stamp")
    if not stamp:
        return None
    folder = Path(reports_dir) / stamp
    return folder if (folder / "manifest.json").is_file() else None


def compare_with_previous(reports_dir: str | Path, manifest: dict[str, Any],
                          results_dir: str | Path) -> dict[str, Any] | None:
    """What changed since the previous archived run of the same kind, or None when there is none."""
    folder = _previous(reports_dir, manifest)
    if folder is None:
        return None
    prev = json.loads((folder / "manifest.json").read_text())
    before = {i["table"]: i for i in prev.get("inputs", [])}
    now = {i["table"]: i for i in manifest.get("inputs", [])}
    changed = [{"name": name, "previous_sha256": before.get(name, {}).get("sha256"),
                "sha256": now.get(name, {}).get("sha256")}
               for name in sorted(set(before) | set(now))
               if before.get(name, {}).get("sha256") != now.get(name, {}).get("sha256")]
    out: dict[str, Any] = {"previous_stamp": prev.get("stamp"), "previous_finished": prev.get("finished"),
                           "changed_inputs": changed, "attrition": [], "estimates": [], "protocol_diff": None}
    results = Path(results_dir)
    if (folder / "attrition.csv").is_file() and (results / "attrition.csv").is_file():
        a0 = pd.read_csv(folder / "attrition.csv")[["step", "remaining"]]
        a1 = pd.read_csv(results / "attrition.csv")[["step", "remaining"]]
        m = a1.merge(a0, on="step", how="left", suffixes=("_current", "_previous"))
        gone = a0[~a0.step.isin(a1.step)].rename(columns={"remaining": "remaining_previous"})
        m = pd.concat([m, gone.assign(remaining_current=pd.NA)], ignore_index=True)
        out["attrition"] = [{"step": r.step, "previous": _int(r.remaining_previous), "current": _int(r.remaining_current)}
                            for r in m.itertuples()]
    if manifest.get("kind") != "design" and (folder / "estimates.csv").is_file() and (results / "estimates.csv").is_file():
        e0 = pd.read_csv(folder / "estimates.csv", keep_default_na=False, na_values=[""])
        e1 = pd.read_csv(results / "estimates.csv", keep_default_na=False, na_values=[""])
        for frame in (e0, e1):  # a run before subgroups existed: every row is the whole cohort's
            if "subgroup" not in frame.columns:
                frame["subgroup"] = pd.NA
        key = [k for k in ESTIMATE_KEY if k in e0.columns and k in e1.columns]
        join = [f"_key_{k}" for k in key]
        for frame in (e0, e1):  # join on text so that empty cells and numbers compare alike
            frame[join] = frame[key].astype(str).to_numpy()
        m = e1.merge(e0[join + ["estimate"]], on=join, how="left", suffixes=("", "_previous"))
        rows = []
        for r in m.to_dict("records"):
            before_value = r.get("estimate_previous")
            shift = r["estimate"] - before_value if pd.notna(before_value) else None
            se = r.get("se")
            rows.append({**{k: None if pd.isna(r[k]) else r[k] for k in key},
                         "previous": None if pd.isna(before_value) else before_value, "current": r["estimate"],
                         "shift": shift,
                         "shift_in_se": shift / se if shift is not None and pd.notna(se) and se > 0 else None})
        out["estimates"] = rows
    t0, t1 = prev.get("protocol", {}).get("text", ""), manifest.get("protocol", {}).get("text", "")
    if t0 != t1:
        out["protocol_diff"] = "".join(difflib.unified_diff(
            t0.splitlines(keepends=True), t1.splitlines(keepends=True),
            fromfile=f"protocol at {prev.get('stamp')}", tofile=f"protocol at {manifest.get('stamp')}"))
    return out


def _int(x: Any) -> int | None:
    return None if pd.isna(x) else int(x)


def archive_run(manifest_path: str | Path, report_path: str | Path, results_dir: str | Path,
                reports_dir: str | Path) -> dict[str, Any]:
    """Copy the report, its manifest and the results to ``REPORTS/<stamp>/``; append the ledger."""
    manifest = json.loads(Path(manifest_path).read_text())
    reports = Path(reports_dir)
    folder = reports / manifest["stamp"]
    if folder.exists():
        raise FileExistsError(f"archive folder {folder} exists already; archives are never overwritten")
    folder.mkdir(parents=True)
    shutil.copy2(report_path, folder / "report.html")
    shutil.copy2(manifest_path, folder / "manifest.json")
    results = Path(results_dir)
    copied = ["report.html", "manifest.json"]
    if manifest.get("kind") != "design":
        for name in ARCHIVED[2:]:
            if (results / name).is_file():
                shutil.copy2(results / name, folder / name)
                copied.append(name)
    else:
        for name in ("attrition.csv", "balance.csv", "positivity.json", "extract_check.json"):
            if (results / name).is_file():
                shutil.copy2(results / name, folder / name)
                copied.append(name)
    entry = {"stamp": manifest["stamp"], "kind": manifest.get("kind", "analysis"),
             "study_id": manifest.get("study_id"), "finished": manifest.get("finished"),
             "folder": str(folder), "report": str(folder / "report.html"),
             "protocol_sha256": manifest.get("protocol_sha256"),
             "inputs": {i["table"]: i["sha256"] for i in manifest.get("inputs", [])},
             "previous_stamp": manifest.get("previous_stamp"), "files": copied}
    with open(reports / "ledger.jsonl", "a", encoding="utf-8") as f:
        f.write(json.dumps(entry, sort_keys=True) + "\n")
    return entry
