"""Paths the workflow needs at parse time: the study id, the extract's files, the protocol's files.

Used by ``workflow/rules/common.smk`` only; no statistics here.
"""

from __future__ import annotations

import sys
from pathlib import Path

from emulant.extract import find_tables
from emulant.protocol import Protocol, ProtocolError, load_protocol


def _fail(msg: str) -> None:
    """Stop the workflow at parse time with the message alone (exit code 2, no traceback)."""
    print(f"emulant: {msg}", file=sys.stderr)
    raise SystemExit(2)


def protocol(protocol_path: str) -> Protocol:
    """The parsed protocol; every protocol problem is listed and the run stops."""
    try:
        return load_protocol(protocol_path)
    except ProtocolError as exc:
        _fail(str(exc))
    raise AssertionError  # unreachable


def protocol_files(protocol: Protocol) -> list[str]:
    """The protocol file and every code-list file it names (their changes rerun the workflow)."""
    files = [str(protocol.path)]
    for c in protocol.concepts.values():
        if c.codes_file:
            f = Path(c.codes_file)
            files.append(str(f if f.is_absolute() else protocol.base_dir / f))
    return list(dict.fromkeys(files))


def extract_files(extract_dir: str, synthetic: bool) -> list[str]:
    """The extract's table files; for the demo extract, the files the generator will write."""
    if synthetic:
        from synthetic_cohort.generate import TABLES

        return [f"{extract_dir}/{t}.parquet" for t in TABLES]
    d = Path(extract_dir)
    if not d.is_dir():
        _fail(f"config key 'extract': folder {extract_dir} does not exist")
    files = find_tables(d)
    if not files:
        _fail(f"config key 'extract': folder {extract_dir} holds no NAME.parquet, NAME.csv or NAME.csv.gz table")
    return [str(f) for f in files.values()]


def bootstrap_chunks(protocol: Protocol, chunks: int | str | None) -> list[str]:
    """The bootstrap chunk files' names (config key ``bootstrap_chunks``: a number or 'auto')."""
    from emulant.estimation.chunks import chunk_name, chunk_ranges
    from emulant.estimation.influence_rows import bootstrap_needed

    if not bootstrap_needed(protocol):  # analysis.variance: influence covers every row
        return []
    return [chunk_name(r) for r in chunk_ranges(protocol.analysis.bootstrap.replicates, chunks)]


# Per rule: memory MB = base + per_mb * extract MB; minutes = base + per_mb * extract MB, where
# the extract is about 110 bytes per person in the demo's parquet files (2.2 MB at 20,000
# persons). Set from build_cohort's measured peak of 1.5 GiB at 1,000,000 persons (README,
# Performance) and a bootstrap chunk holding the cohort and its person-periods in each of its
# worker processes, with room to spare; a cluster's accounting may tighten them.
JOB_SCALE = {  # rule: (mem base, mem per extract MB, minutes base, minutes per extract MB)
    "synthesize_extract": (1000, 20, 10, 0.1),
    "check_extract": (1000, 8, 10, 0.05),
    "build_cohort": (1000, 20, 10, 0.2),
    "build_periods": (1000, 20, 10, 0.2),
    "fit_weights": (1000, 16, 10, 0.1),
    "check_balance": (1000, 16, 10, 0.1),
    "estimate_point": (1000, 30, 10, 0.2),
    "bootstrap_chunk": (2000, 40, 15, 0.6),
    "estimate_effects": (1000, 8, 10, 0.02),
    "render_report": (1000, 16, 10, 0.1),
    "archive_report": (500, 0, 5, 0.0),
}
BYTES_PER_PERSON = 110


def job_size(extract_files: list[str], synthetic_persons: int) -> dict[str, dict[str, int]]:
    """``{rule: {"mem_mb", "runtime"}}`` for cluster jobs, scaled from the extract's size.

    The size is that of the extract's files, or (the demo extract before it is written) the
    synthetic person count at about 110 bytes a person. Rules not listed get the archive's.
    """
    sizes = [Path(f).stat().st_size for f in extract_files if Path(f).is_file()]
    mb = sum(sizes) / 1e6 if sizes else synthetic_persons * BYTES_PER_PERSON / 1e6
    out = {rule: {"mem_mb": int(m0 + m1 * mb), "runtime": int(t0 + t1 * mb)}
           for rule, (m0, m1, t0, t1) in JOB_SCALE.items()}
    for rule in ("render_design", "archive_design"):
        out[rule] = out[rule.replace("design", "report")]
    return out
