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

    return [chunk_name(r) for r in chunk_ranges(protocol.analysis.bootstrap.replicates, chunks)]
