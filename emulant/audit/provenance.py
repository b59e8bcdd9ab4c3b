"""The audit trail: the run manifest, the run stamp, the archive, and the comparison with the previous run.

``REPORTS/<study>/<stamp>/`` keeps every rendered report with its manifest and the results a
reviewer needs to reproduce it; it is never overwritten. ``REPORTS/<study>/ledger.jsonl`` lists
the runs, one JSON line each, append-only.
"""

from __future__ import annotations

import datetime as dt
import difflib
import json
import os
import platform
import shutil
import subprocess
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd

from emulant import __version__
from emulant import disclosure as dc
from emulant.audit import shareable
from emulant.extract import sha256_file
from emulant.protocol import Protocol
from emulant.protocol.as_input import as_input

PACKAGES = ("emulant", "snakemake", "duckdb", "pandas", "pyarrow", "numpy", "scipy", "statsmodels",
            "lifelines", "scikit-learn", "jinja2", "matplotlib", "pydantic", "pyyaml")
RESULT_FILES = ("extract_check.json", "attrition.csv", "cohort.parquet", "weights.parquet",
                "positivity.json", "balance.csv", "estimates.csv", "curves.csv", "bootstrap.json",
                "person_periods.parquet", "periods.parquet", "decision.csv", "adherence.csv")
# What leaves the run folder, each in its shared form (emulant.audit.shareable). The curves (event
# days), the balance table (SMDs that a suppressed count would give back) and the person-level
# files stay in results/<study>/ only.
ARCHIVED = ("report.html", "manifest.json", "estimates.csv", "attrition.csv", "positivity.json",
            "bootstrap.json", "extract_check.json", "decision.csv")
DESIGN_ARCHIVED = ("attrition.csv", "positivity.json", "extract_check.json")
PARTIAL = "partial-"
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
    m = protocol.report.min_cell
    extract = check.get("extract")
    inputs = [{"table": name, "path": dc.shown_path(t.get("file"), extract=extract),
               "sha256": t.get("sha256"), "rows": dc.shared_count(t.get("rows"), m)}
              for name, t in sorted(check.get("tables", {}).items())]
    for c in protocol.concepts.values():
        if c.codes_file:
            f = Path(c.codes_file)
            f = f if f.is_absolute() else protocol.base_dir / f
            inputs.append({"table": f"codelist:{c.name}", "path": dc.shown_path(f), "sha256": sha256_file(f),
                           "rows": len(c.codes)})
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
        "protocol": {"path": dc.shown_path(protocol.path), "sha256": protocol.sha256, "text": protocol.text,
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
                          results_dir: str | Path, min_cell: int) -> dict[str, Any] | None:
    """What changed since the previous archived run of the same kind, or None when there is none.

    Counts are compared in the form each run showed them (:mod:`emulant.audit.shareable`), and a
    change is given only as :func:`emulant.disclosure.count_changes` allows.
    """
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
        a0, a1 = (shareable.shareable_attrition(pd.read_csv(f, dtype={"remaining": object, "excluded": object},
                                                            keep_default_na=False), min_cell)
                  for f in (folder / "attrition.csv", results / "attrition.csv"))
        a0 = a0.assign(remaining=[_exact(x) for x in a0.remaining])
        a1 = a1.assign(remaining=[_exact(x) for x in a1.remaining])
        prev_by = dict(zip(a0.step, a0.remaining, strict=True))
        steps = list(a1.step) + [s for s in a0.step if s not in set(a1.step)]
        cur_by = dict(zip(a1.step, a1.remaining, strict=True))
        rows = dc.count_changes([prev_by.get(s) for s in steps], [cur_by.get(s) for s in steps], min_cell)
        out["attrition"] = [{"step": s, **r} for s, r in zip(steps, rows, strict=True)]
    if manifest.get("kind") != "design" and (folder / "estimates.csv").is_file() and (results / "estimates.csv").is_file():
        e0, e1 = (shareable.shareable_estimates(pd.read_csv(f, keep_default_na=False, na_values=[""]), min_cell)
                  for f in (folder / "estimates.csv", results / "estimates.csv"))
        for frame in (e0, e1):
            frame["estimate"] = pd.to_numeric(frame["estimate"], errors="coerce")
            if "se" in frame:
                frame["se"] = pd.to_numeric(frame["se"], errors="coerce")
            if "subgroup" not in frame.columns:  # a run before subgroups existed: the whole cohort's
                frame["subgroup"] = pd.NA
        key = [k for k in ESTIMATE_KEY if k in e0.columns and k in e1.columns]
        join = [f"_key_{k}" for k in key]
        for frame in (e0, e1):  # join on text so that empty cells and numbers compare alike
            frame[join] = frame[key].astype(str).to_numpy()
        m = e1.merge(e0[join + ["estimate"]], on=join, how="left", suffixes=("", "_previous"))
        rows = []
        for r in m.to_dict("records"):
            before_value = r.get("estimate_previous")
            shift = r["estimate"] - before_value if pd.notna(before_value) and pd.notna(r["estimate"]) else None
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


def _exact(x: Any) -> str:
    """A shown cell as text; a whole number without thousands separators."""
    v = dc.parse_shown(x)
    return str(v) if v is not None else str(x)


def _write_shareable(name: str, src: Path, dst: Path, min_cell: int) -> None:
    """Write ``src`` to ``dst`` in its shared form (:mod:`emulant.audit.shareable`)."""
    if name == "extract_check.json":
        dst.write_text(json.dumps(shareable.shareable_check(json.loads(src.read_text()), min_cell),
                                  indent=2, default=str) + "\n", encoding="utf-8")
    elif name == "positivity.json":
        dst.write_text(json.dumps(shareable.shareable_positivity(json.loads(src.read_text()), min_cell),
                                  indent=2, default=str) + "\n", encoding="utf-8")
    elif name == "attrition.csv":
        df = pd.read_csv(src, dtype={"remaining": object, "excluded": object}, keep_default_na=False)
        shareable.shareable_attrition(df, min_cell).to_csv(dst, index=False, lineterminator="\n")
    elif name == "estimates.csv":
        df = pd.read_csv(src, keep_default_na=False, na_values=[""])
        shareable.shareable_estimates(df, min_cell).to_csv(dst, index=False, lineterminator="\n",
                                                           float_format="%.10g")
    else:
        shutil.copy2(src, dst)


def archive_run(manifest_path: str | Path, report_path: str | Path, results_dir: str | Path,
                reports_dir: str | Path, min_cell: int) -> dict[str, Any]:
    """Put the report, its manifest and the shared form of the results in ``REPORTS/<stamp>/``;
    append one line to the ledger.

    The folder is filled under a hidden temporary name and renamed into place whole, so an
    interrupted run leaves no half-written archive (a leftover temporary folder is removed by the
    next archive); the ledger line is written with one ``write`` and flushed to disk.
    """
    manifest = json.loads(Path(manifest_path).read_text())
    reports = Path(reports_dir)
    folder = reports / manifest["stamp"]
    if folder.exists():
        raise FileExistsError(f"archive folder {folder} exists already; archives are never overwritten")
    reports.mkdir(parents=True, exist_ok=True)
    for stale in reports.glob(f".{PARTIAL}*"):
        shutil.rmtree(stale, ignore_errors=True)
    tmp = reports / f".{PARTIAL}{manifest['stamp']}"
    tmp.mkdir()
    shutil.copy2(report_path, tmp / "report.html")
    shutil.copy2(manifest_path, tmp / "manifest.json")
    results = Path(results_dir)
    copied = ["report.html", "manifest.json"]
    names = ARCHIVED[2:] if manifest.get("kind") != "design" else DESIGN_ARCHIVED
    for name in names:
        if (results / name).is_file():
            _write_shareable(name, results / name, tmp / name, min_cell)
            copied.append(name)
    os.replace(tmp, folder)
    entry = {"stamp": manifest["stamp"], "kind": manifest.get("kind", "analysis"),
             "study_id": manifest.get("study_id"), "finished": manifest.get("finished"),
             "folder": manifest["stamp"], "report": f"{manifest['stamp']}/report.html",
             "protocol_sha256": manifest.get("protocol_sha256"),
             "inputs": {i["table"]: i["sha256"] for i in manifest.get("inputs", [])},
             "previous_stamp": manifest.get("previous_stamp"), "files": copied}
    line = (json.dumps(entry, sort_keys=True) + "\n").encode("utf-8")
    fd = os.open(reports / "ledger.jsonl", os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, line)
        os.fsync(fd)
    finally:
        os.close(fd)
    return entry
