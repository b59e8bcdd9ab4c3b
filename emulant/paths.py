"""Paths the workflow needs at parse time: the study id, the extract's files, the protocol's files.

Used by ``workflow/rules/common.smk`` only; no statistics here.
"""

from __future__ import annotations

import sys
from pathlib import Path

from emulant.errors import EmulantError
from emulant.extract import find_tables
from emulant.protocol import ProtocolError, load_protocol

SYNTHETIC_TABLES = ("persons", "coverage", "dispensings", "diagnoses", "measurements", "deaths")


class WorkflowConfigError(EmulantError):
    """A run-time setting that cannot be used; the message names the key and the path."""


def _fail(msg: str) -> None:
    print(f"emulant: {msg}", file=sys.stderr)
    raise WorkflowConfigError(msg)


def study_id(protocol_path: str) -> str:
    """The protocol's ``study.id``; every protocol problem is listed and the run stops."""
    try:
        return load_protocol(protocol_path).study.id
    except ProtocolError as exc:
        _fail(str(exc))
    raise AssertionError  # unreachable


def protocol_files(protocol_path: str) -> list[str]:
    """The protocol file and every code-list file it names (their changes rerun the workflow)."""
    p = load_protocol(protocol_path)
    files = [str(protocol_path)]
    for c in p.concepts.values():
        if c.codes_file:
            f = Path(c.codes_file)
            files.append(str(f if f.is_absolute() else Path(protocol_path).parent / f))
    return list(dict.fromkeys(files))


def extract_files(extract_dir: str, synthetic: bool) -> list[str]:
    """The extract's table files; for the demo extract, the files the generator will write."""
    if synthetic:
        return [f"{extract_dir}/{t}.parquet" for t in SYNTHETIC_TABLES]
    d = Path(extract_dir)
    if not d.is_dir():
        _fail(f"config key 'extract': folder {extract_dir} does not exist")
    files = find_tables(d)
    if not files:
        _fail(f"config key 'extract': folder {extract_dir} holds no NAME.parquet, NAME.csv or NAME.csv.gz table")
    return [str(f) for f in files.values()]
