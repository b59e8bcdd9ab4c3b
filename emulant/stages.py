"""One function per workflow rule: read the rule's files, call the library, write its outputs.

Each takes ``(input, output, params)`` as Snakemake passes them (anything with attribute
access works, so tests call them with ``types.SimpleNamespace``). :func:`run` is the scripts'
entry: it sends the log to the rule's log file and turns our errors into a plain message and
exit code 2, never a traceback. Outputs are written to a temporary name and renamed, so a
failure never leaves a half-written file behind.

Each stage imports the library modules it needs inside its function, so that a rule's job loads
only its own stage (a Snakemake job is one process per rule); this is about start-up time, not
import circles, which ``tests/test_imports.py`` rules out for these imports too.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd

from emulant.errors import EmulantError
from emulant.protocol import load_protocol

log = logging.getLogger("emulant")


# ----------------------------------------------------------------------------- writing


@contextlib.contextmanager
def atomic(path: str | Path):
    """Yield a temporary path beside ``path``; rename it into place only on success."""
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(f".{p.name}.tmp{os.getpid()}")
    try:
        yield tmp
        os.replace(tmp, p)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_json(path: str | Path, obj: Any) -> None:
    with atomic(path) as tmp:
        tmp.write_text(json.dumps(obj, indent=2, sort_keys=False, default=str) + "\n", encoding="utf-8")


def write_csv(path: str | Path, df: pd.DataFrame) -> None:
    with atomic(path) as tmp:
        df.to_csv(tmp, index=False, lineterminator="\n", float_format="%.10g")


def write_parquet(path: str | Path, df: pd.DataFrame) -> None:
    with atomic(path) as tmp:
        df.to_parquet(tmp, index=False)


def _protocol_path(input: Any) -> str:
    """The protocol file: the first of the rule's ``protocol`` inputs (the rest are its code lists)."""
    files = input.protocol
    return str(files if isinstance(files, str | Path) else files[0])


def _extract_dir(input: Any) -> Path:
    """The extract folder: the one holding the rule's table files."""
    tables = input.tables
    return Path(tables if isinstance(tables, str | Path) else tables[0]).parent


# ----------------------------------------------------------------------------- stages


def synthesize_extract(input: Any, output: Any, params: Any) -> None:
    from synthetic_cohort.generate import write_synthetic

    write_synthetic(Path(output.truth).parent, persons=int(params.persons), seed=int(params.seed),
                    fmt="parquet", scenario=getattr(params, "scenario", None) or "demo")


def check_extract(input: Any, output: Any, params: Any) -> None:
    from emulant.audit import shareable
    from emulant.extract import check_extract as check

    protocol = load_protocol(_protocol_path(input))
    report = check(_extract_dir(input), protocol, dict(params.duckdb))
    for w in report.get("warnings", []):
        log.warning("%s", w)
    write_json(output.examples, shareable.person_level_check(report))
    write_json(output.check, shareable.shareable_check(report))


def build_cohort(input: Any, output: Any, params: Any) -> None:
    from emulant.audit import shareable
    from emulant.cohort import build_cohort as build
    from emulant.extract import open_extract

    protocol = load_protocol(_protocol_path(input))
    extract = open_extract(_extract_dir(input), protocol, dict(params.duckdb))
    res = build(extract, protocol)
    m = protocol.report.min_cell
    shown = shareable.shareable_attrition(res.attrition, m)
    log.info("attrition (as the report shows it):\n%s", shown.to_string(index=False))
    cohort = res.cohort
    if protocol.per_protocol:  # stop, switch and deviation days (CONTRACTS §5b)
        from emulant.cohort.person_time import add_deviations, deviation_counts

        cohort = add_deviations(extract, protocol, cohort)
        log.info("deviations within follow-up:\n%s",
                 shareable.shareable_deviations(deviation_counts(cohort, protocol), m).to_string(index=False))
    write_csv(output.attrition, res.attrition)
    write_parquet(output.cohort, cohort)


def build_periods(input: Any, output: Any, params: Any) -> None:
    from emulant.cohort.person_time import build_periods as build
    from emulant.extract import open_extract

    protocol = load_protocol(_protocol_path(input))
    extract = open_extract(_extract_dir(input), protocol, dict(params.duckdb))
    with atomic(output.periods) as tmp:
        rows = build(extract, protocol, input.cohort, tmp)
    log.info("periods.parquet: %d person-periods", rows)


def fit_weights(input: Any, output: Any, params: Any) -> None:
    from emulant.models.positivity import positivity_of
    from emulant.models.weights import fit_weights as fit_weights_of

    protocol = load_protocol(_protocol_path(input))
    fit = fit_weights_of(pd.read_parquet(input.cohort), protocol)
    write_parquet(output.weights, fit.table)
    write_json(output.positivity, positivity_of(fit, protocol))


def check_balance(input: Any, output: Any, params: Any) -> None:
    from emulant.models.balance import balance_table

    protocol = load_protocol(_protocol_path(input))
    table = balance_table(pd.read_parquet(input.cohort), pd.read_parquet(input.weights), protocol)
    write_csv(output.balance, table)


def _periods(input: Any) -> pd.DataFrame | None:
    """periods.parquet when the rule has it as an input (the per-protocol contrast)."""
    files = getattr(input, "periods", None)
    if not files:
        return None
    return pd.read_parquet(files if isinstance(files, str | Path) else files[0])


def estimate_point(input: Any, output: Any, params: Any) -> None:
    from emulant.estimation.chunks import point_to_json
    from emulant.estimation.effects import point_estimate

    protocol = load_protocol(_protocol_path(input))
    point = point_estimate(pd.read_parquet(input.cohort), protocol, _periods(input))
    if getattr(output, "adherence", None):
        write_csv(output.adherence, point.adherence)
    if getattr(output, "periods", None):  # the person-periods with the weights used
        write_parquet(output.periods, point.periods)
    with atomic(output.point) as tmp:
        tmp.write_text(point_to_json(point), encoding="utf-8")


def bootstrap_chunk(input: Any, output: Any, params: Any) -> None:
    from emulant.estimation.chunks import read_point, write_run
    from emulant.estimation.effects import bootstrap_replicates

    protocol = load_protocol(_protocol_path(input))
    only = range(int(params.first), int(params.last) + 1)
    run = bootstrap_replicates(pd.read_parquet(input.cohort), protocol, read_point(input.point),
                               only, workers=int(params.workers), progress=sys.stderr.isatty(),
                               periods=_periods(input))
    log.info("replicates %d-%d: %d completed, %d failed in %.1f s on %d worker(s)", only.start,
             only.stop - 1, run.completed, run.failed, run.seconds, run.workers)
    with atomic(output.chunk) as tmp, open(tmp, "wb") as fh:
        write_run(fh, run)


def estimate_effects(input: Any, output: Any, params: Any) -> None:
    from emulant.estimation.chunks import read_point, read_run
    from emulant.estimation.effects import gather_effects

    protocol = load_protocol(_protocol_path(input))
    chunk_files = [input.chunks] if isinstance(input.chunks, str | Path) else list(input.chunks)
    runs = [read_run(f) for f in chunk_files]
    for f, run in zip(chunk_files, runs, strict=True):
        log.info("%s: %d completed, %d failed", Path(f).name, run.completed, run.failed)
    res = gather_effects(read_point(input.point), runs, protocol)
    b = res.bootstrap
    log.info("bootstrap: %d of %d replicates completed, %d failed, across %d chunk(s)%s",
             b["completed"], b["requested"], b["failed"], len(runs),
             "".join(f"; {k}: {v}" for k, v in b["failure_reasons"].items()))
    write_csv(output.estimates, res.estimates)
    write_csv(output.curves, res.curves)
    write_json(output.bootstrap, res.bootstrap)
    write_csv(output.decision, res.decision)


def render_report(input: Any, output: Any, params: Any) -> None:
    from emulant.audit import provenance
    from emulant.report import render_report as render

    protocol = load_protocol(_protocol_path(input))
    kind = "design" if params.design else "analysis"
    results = Path(input.check).parent
    manifest = provenance.build_manifest(protocol, results, params.reports, kind=kind)
    comparison = provenance.compare_with_previous(params.reports, manifest, results,
                                                  protocol.report.min_cell)
    with atomic(output.report) as tmp:
        render(results, protocol, tmp, manifest=manifest, comparison=comparison,
               design=bool(params.design))
    write_json(output.manifest, manifest)


def archive_report(input: Any, output: Any, params: Any) -> None:
    from emulant.audit import provenance

    protocol = load_protocol(_protocol_path(input))
    entry = provenance.archive_run(input.manifest, input.report, Path(input.check).parent,
                                   params.reports, protocol.report.min_cell)
    log.info("archived to %s/%s", params.reports, entry["folder"])
    write_json(output.archived, entry)


# ----------------------------------------------------------------------------- entry


def _shown_error(message: str, logfile: str | None, rule: str) -> str:
    """The error as the log and the terminal may show it (:mod:`emulant.disclosure`); the full
    message, with its person_id examples, goes to the results folder's person-level files."""
    from emulant import disclosure as dc

    shown = dc.without_person_examples(message)
    if shown != message and logfile:
        full = Path(logfile).parent.parent / dc.PERSON_LEVEL_DIR / f"{rule}-problems.txt"
        full.parent.mkdir(parents=True, exist_ok=True)
        full.write_text(f"# {dc.PERSON_LEVEL_NOTE}\n{message}\n", encoding="utf-8")
        shown += f"\n(the examples, with person identifiers, are in {dc.shown_path(full)})"
    return shown


def run(snakemake: Any, stage: Callable[[Any, Any, Any], None]) -> None:
    """Run one stage under Snakemake: log to the rule's log, our errors as exit code 2.

    The job stops by itself when its Snakemake process is killed
    (:func:`emulant.runner.follow_workflow`), so it never writes outputs after its run is gone.
    """
    from emulant.runner import follow_workflow

    follow_workflow()
    logfile = snakemake.log[0] if len(snakemake.log) else None
    handlers: list[logging.Handler] = [logging.StreamHandler(sys.stderr)]
    if logfile:
        Path(logfile).parent.mkdir(parents=True, exist_ok=True)
        handlers.append(logging.FileHandler(logfile, mode="w", encoding="utf-8"))
    logging.basicConfig(level=logging.INFO, handlers=handlers, force=True,
                        format="%(asctime)s %(levelname)s %(message)s")
    logging.captureWarnings(True)
    t0 = time.perf_counter()
    try:
        stage(snakemake.input, snakemake.output, snakemake.params)
    except EmulantError as exc:
        log.error("rule %s stopped: %s", snakemake.rule, _shown_error(str(exc), logfile, snakemake.rule))
        sys.exit(2)
    log.info("rule %s done in %.1f s", snakemake.rule, time.perf_counter() - t0)
