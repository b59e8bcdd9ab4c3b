"""The ``emulant`` command: check a protocol against an extract, write the invented demo extract,
say where a run's results and reports are, draft a protocol from an extract, print the protocol's
JSON Schema.

Every error a user can cause is printed as a list of one-line problems and the command exits 2;
no traceback reaches the terminal. An unexpected failure is printed in one line naming what was
being done, and also exits 2.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

EXIT_OK = 0
EXIT_PROBLEMS = 2


class _Failed(Exception):
    """Internal: a stage failed; its message is already printed."""


def _problems(title: str, problems: Sequence[str], keep: str | None = None) -> None:
    """Print the problems as the terminal may show them (no person_id examples; disclosure rule).

    With ``keep`` (the ``--save-check`` file), the full problems go to its folder's person-level
    files instead.
    """
    from emulant import disclosure as dc

    shown = [dc.without_person_examples(p) for p in problems]
    print(f"{dc.without_person_examples(title)}: {len(problems)} problem(s)", file=sys.stderr)
    for p in shown:
        print(f"  - {p}", file=sys.stderr)
    if shown != list(problems):
        if keep:
            full = Path(keep).parent / dc.PERSON_LEVEL_DIR / "check-problems.txt"
            full.parent.mkdir(parents=True, exist_ok=True)
            full.write_text(f"# {dc.PERSON_LEVEL_NOTE}\n" + "\n".join(problems) + "\n", encoding="utf-8")
            print(f"  (examples with person identifiers: {full})", file=sys.stderr)
        else:
            print("  (examples with person identifiers are not printed; add --save-check FILE to "
                  f"keep them in FILE's folder {dc.PERSON_LEVEL_DIR}/)", file=sys.stderr)


def _stage(doing: str, fn: Callable[[], Any], expected: tuple[type[BaseException], ...] = ()) -> Any:
    """Run one stage; ``expected`` exceptions pass, any other becomes one line naming ``doing``."""
    try:
        return fn()
    except (KeyboardInterrupt, _Failed, *expected):
        raise
    except Exception as exc:  # noqa: BLE001 - the user sees one line, never a traceback
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        print(f"error while {doing}: {type(exc).__name__}: {msg}", file=sys.stderr)
        raise _Failed from None


def _settings(args: argparse.Namespace) -> dict[str, Any]:
    s: dict[str, Any] = {}
    if args.threads is not None:
        s["threads"] = args.threads
    if args.memory_limit:
        s["memory_limit"] = args.memory_limit
    if args.temp_dir:
        s["temp_directory"] = args.temp_dir
    return s


def _print_check(result: Mapping[str, Any], min_cell: int) -> None:
    """The check as the terminal may show it (the disclosure rule: no count below ``min_cell``,
    dates by month, no person identifier)."""
    import pandas as pd

    from emulant import disclosure as dc

    rows = [{"table": t, "file": Path(v["file"]).name, "rows": dc.show_count(v["rows"], min_cell),
             "dates (month)": dc.month_range(v["date_min"], v["date_max"])}
            for t, v in result["tables"].items()]
    print(f"Extract {dc.shown_path(result['extract'])}: {len(rows)} table(s), "
          f"person_id as {result['person_id_type']}")
    print(pd.DataFrame(rows).to_string(index=False))
    excluded = {t: v for t, v in result["implausible"].items() if v["before_birth"] or v["after_death"]}
    if excluded:
        print("\nRows dated before birth or after death (excluded from the analysis):")
        for t, v in excluded.items():
            print(f"  {t}: {dc.show_count(v['before_birth'], min_cell)} before birth, "
                  f"{dc.show_count(v['after_death'], min_cell)} after death")
        print(f"  (examples are person-level: written only with --save-check, to its folder's "
              f"{dc.PERSON_LEVEL_DIR}/)")
    _print_warnings(result.get("warnings", []))


def _print_warnings(warnings: Sequence[str]) -> None:
    if warnings:
        print(f"\nWarnings ({len(warnings)}):")
        for w in warnings:
            print(f"  - {w}")


def cmd_check(args: argparse.Namespace) -> int:
    """Validate the protocol and the extract, then print the attrition of the eligibility steps."""
    from emulant.extract import ExtractError, check_extract, open_extract
    from emulant.protocol import ProtocolError, load_protocol

    protocol, failed = None, False
    try:
        protocol = _stage(f"reading the protocol {args.protocol}", lambda: load_protocol(args.protocol),
                          (ProtocolError,))
    except ProtocolError as exc:
        _problems(f"protocol {args.protocol}", exc.problems)
        failed = True
    try:  # the extract is checked even when the protocol failed, so every problem shows at once
        result = _stage(f"checking the extract {args.extract}",
                        lambda: check_extract(args.extract, protocol, _settings(args)), (ExtractError,))
    except ExtractError as exc:
        _problems(f"extract {args.extract}", exc.problems, getattr(args, "save_check", None))
        return EXIT_PROBLEMS
    if failed:
        return EXIT_PROBLEMS
    if args.save_check:
        from emulant import disclosure as dc
        from emulant.audit import shareable

        out = Path(args.save_check)
        (out.parent / dc.PERSON_LEVEL_DIR).mkdir(parents=True, exist_ok=True)
        (out.parent / dc.PERSON_LEVEL_DIR / "extract_examples.json").write_text(
            json.dumps(shareable.person_level_check(result), indent=2, default=str) + "\n")
        out.write_text(json.dumps(shareable.shareable_check(result), indent=2, default=str) + "\n")
    from emulant import disclosure as dc

    print(f"Protocol {dc.shown_path(args.protocol)}: study {protocol.study.id}")
    m = protocol.report.min_cell
    _print_check(result, m)

    def steps():
        from emulant.cohort import CohortError, build_cohort
        from emulant.cohort.person_time import add_deviations, deviation_counts

        extract = open_extract(args.extract, protocol, _settings(args))
        try:  # the whole cohort, so that its covariates can be checked too
            res = build_cohort(extract, protocol)
            if not protocol.per_protocol:
                return res, None, None
            # per protocol: its deviation days too
            cohort = add_deviations(extract, protocol, res.cohort)
            return res, deviation_counts(cohort, protocol), None
        except CohortError as exc:
            return None, None, exc

    cohort, deviations, error = _stage("running the eligibility steps", steps)
    if error is not None:
        _problems("eligibility", getattr(error, "problems", None) or [str(error)])
        return EXIT_PROBLEMS
    from emulant.audit import shareable

    print(f"\nAttrition (eligibility steps in order; counts below {m} shown as <{m}):")
    print(shareable.shareable_attrition(cohort.attrition, m).to_string(index=False))
    if deviations is not None:
        print("\nDeviations from the strategies within follow-up (design clone: clones), per arm:")
        print(shareable.shareable_deviations(deviations, m).to_string(index=False))
    from emulant.cohort.covariates import single_value_covariates

    _print_warnings(single_value_covariates(protocol, cohort.cohort))
    return EXIT_OK


def cmd_synth(args: argparse.Namespace) -> int:
    """Write the invented demo extract, its protocol and its truth."""
    if args.persons < 1:
        _problems("synth", [f"--persons: expected a whole number >= 1, got {args.persons}"])
        return EXIT_PROBLEMS

    def run():
        from synthetic_cohort.generate import write_synthetic

        return write_synthetic(Path(args.out), persons=args.persons, seed=args.seed, fmt=args.format,
                               scenario=args.scenario)

    written = _stage(f"writing the synthetic extract to {args.out}", run)
    out = Path(args.out)
    files = sorted(f for f in out.rglob("*") if f.is_file())
    print(f"Wrote the synthetic extract ({args.persons} persons, seed {args.seed}, {args.format}) "
          f"to {out}: {len(files)} file(s)")
    for f in files:
        print(f"  {f.relative_to(out)}  ({f.stat().st_size:,} bytes)")
    if isinstance(written, Mapping):  # the generator's summary: show its short entries only
        eligible = written.get("eligible")
        if isinstance(eligible, Mapping) and "n" in eligible:
            arms = eligible.get("by_arm") or {}
            print(f"Eligible persons (true count): {eligible['n']}"
                  + (" (" + ", ".join(f"{k} {v}" for k, v in arms.items()) + ")" if arms else ""))
    return EXIT_OK


def cmd_where(args: argparse.Namespace) -> int:
    """Print the results folder of the configured study and its newest archived report."""
    from emulant.protocol import ProtocolError, load_protocol
    from emulant.runner import ConfigError, latest_report, read_config

    try:
        cfg = read_config(args.config, args.configfile)
        protocol = _stage(f"reading the protocol {cfg['protocol']}", lambda: load_protocol(cfg["protocol"]),
                          (ProtocolError,))
    except ConfigError as exc:
        _problems("config", exc.problems)
        return EXIT_PROBLEMS
    except ProtocolError as exc:
        _problems(f"protocol {cfg['protocol']}", exc.problems)
        return EXIT_PROBLEMS
    sid = protocol.study.id
    results = Path(cfg.get("results") or "results") / sid
    reports = Path(cfg.get("reports") or "reports") / sid
    report = _stage(f"reading {reports / 'ledger.jsonl'}", lambda: latest_report(reports))
    print(f"Study {sid}")
    print(f"  results: {results}")
    print(f"  latest report: {report}" if report else f"  latest report: none yet ({reports / 'ledger.jsonl'} not found)")
    return EXIT_OK


def cmd_draft(args: argparse.Namespace) -> int:
    """Check the extract and write a commented first protocol draft from it."""
    from emulant.extract import ExtractError
    from emulant.extract.draft import write_draft

    out = Path(args.out)
    if out.exists() and not args.force:
        _problems("draft", [f"--out: {out} exists; choose another file or pass --force"])
        return EXIT_PROBLEMS
    if args.min_cell < 1 or args.prefix_length < 1:
        _problems("draft", ["--min-cell and --prefix-length: expected whole numbers >= 1"])
        return EXIT_PROBLEMS
    try:
        summary = _stage(f"drafting a protocol from {args.extract}",
                         lambda: write_draft(args.extract, out, args.min_cell, args.prefix_length, _settings(args)),
                         (ExtractError,))
    except ExtractError as exc:
        _problems(f"extract {args.extract}", exc.problems, getattr(args, "save_check", None))
        return EXIT_PROBLEMS
    print(f"Wrote the protocol draft {out} ({len(summary['check']['tables'])} tables, "
          f"{summary['persons']:,} persons). Fill in every `codes: []`, then run:")
    print(f"  emulant check --extract {args.extract} --protocol {out}")
    return EXIT_OK


def cmd_schema(args: argparse.Namespace) -> int:
    """Print the protocol's JSON Schema (generated from the protocol's key table)."""
    from emulant.protocol.schema import schema_text

    sys.stdout.write(schema_text())
    return EXIT_OK


def cmd_pdf(args: argparse.Namespace) -> int:
    """``emulant pdf``: the report printed to PDF; exit 2 with a clear message without Chromium."""
    from emulant.report.pdf import PdfError, html_to_pdf

    try:
        out = html_to_pdf(args.report, args.out)
    except PdfError as exc:
        _problems("emulant pdf", [str(exc)])
        return EXIT_PROBLEMS
    print(f"Wrote {out}")
    return EXIT_OK


def _duckdb_options(parser: argparse.ArgumentParser) -> None:
    """The DuckDB settings a command that reads the extract takes."""
    parser.add_argument("--threads", type=int, metavar="N", help="DuckDB threads (default 2)")
    parser.add_argument("--memory-limit", metavar="SIZE", help="DuckDB memory limit, e.g. 4GB")
    parser.add_argument("--temp-dir", metavar="DIR", help="where DuckDB spills to disk")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="emulant",
        description="Emulate a target trial from registry-style extracts. The workflow runs with "
                    "snakemake; this command checks inputs, writes the demo extract, drafts a protocol from an extract and prints the protocol's schema.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    ck = sub.add_parser("check", help="validate an extract and a protocol, print the attrition",
                        description="Validate the protocol and the extract (every problem listed "
                                    "at once), then build the cohort, print the attrition of the "
                                    "eligibility steps and warn of covariates with a single value. "
                                    "A protocol asking for per_protocol also gets, per arm, how "
                                    "many stopped or switched within follow-up. "
                                    "Exit 0, or 2 when there is any problem.")
    ck.add_argument("--extract", required=True, metavar="PATH", help="folder of the extract's tables")
    ck.add_argument("--protocol", required=True, metavar="FILE", help="the protocol YAML file")
    ck.add_argument("--save-check", metavar="FILE", help="also write the check as JSON (extract_check.json)")
    _duckdb_options(ck)
    ck.set_defaults(func=cmd_check)

    sy = sub.add_parser("synth", help="write the invented demo extract, its protocol and truth",
                        description="Write the invented synthetic registry extract, the demo "
                                    "protocol with its code lists, and truth.json.")
    sy.add_argument("--persons", type=int, default=20000, metavar="N", help="persons (default 20000)")
    sy.add_argument("--seed", type=int, default=20261201, metavar="S", help="random seed (default 20261201)")
    sy.add_argument("--out", required=True, metavar="DIR", help="output folder")
    sy.add_argument("--format", choices=("parquet", "csv"), default="parquet",
                    help="table file format (default parquet)")
    sy.add_argument("--scenario", choices=("demo", "designs"), default="demo",
                    help="demo (default) | designs (an index flare: clone, sequential, dynamic)")
    sy.set_defaults(func=cmd_synth)

    wh = sub.add_parser("where", help="print where the configured study's results and reports are",
                        description="Read the run configuration and print the study's results "
                                    "folder and its newest archived report. Give the same "
                                    "--config as the run (KEY=VALUE overrides, as Snakemake takes them).")
    wh.add_argument("--config", nargs="+", metavar="KEY=VALUE",
                    help="overrides of the run configuration, e.g. extract=PATH protocol=FILE "
                         "(one FILE without '=' names the configuration file, as before)")
    wh.add_argument("--configfile", metavar="FILE", help="the run configuration (default config/config.yaml)")
    wh.set_defaults(func=cmd_where)

    dr = sub.add_parser("draft", help="write a first protocol draft from an extract",
                        description="Check the extract, then write a commented protocol draft: the "
                                    "tables, columns and date ranges found, each event source's most "
                                    "frequent code prefixes (only those held by at least --min-cell "
                                    "persons), and the two-arm initiators design with a placeholder "
                                    "for every required key. Fill in the concepts' codes, then run "
                                    "'emulant check'.")
    dr.add_argument("--extract", required=True, metavar="PATH", help="folder of the extract's tables")
    dr.add_argument("--out", required=True, metavar="FILE", help="the protocol draft to write (not overwritten)")
    dr.add_argument("--min-cell", type=int, default=5, metavar="N",
                    help="show a code prefix only when at least N persons hold it (default 5)")
    dr.add_argument("--prefix-length", type=int, default=3, metavar="K",
                    help="characters of a code prefix (default 3)")
    dr.add_argument("--force", action="store_true", help="overwrite --out when it exists")
    _duckdb_options(dr)
    dr.set_defaults(func=cmd_draft)

    sc = sub.add_parser("schema", help="print the protocol's JSON Schema (for editors)",
                        description="Print the JSON Schema of the protocol file. Save it beside "
                                    "your protocol and start the protocol with the line "
                                    "'# yaml-language-server: $schema=protocol.schema.json' so an "
                                    "editor that reads it completes keys and flags errors. "
                                    "Every key is described in docs/protocol.md.")
    sc.set_defaults(func=cmd_schema)

    pd_ = sub.add_parser("pdf", help="print a rendered report to PDF with headless Chromium",
                         description="Print REPORT.html to PDF through headless Chromium (A4, a "
                                     "page per section, page numbers; folded parts opened). "
                                     "Chromium is looked for as chromium, chromium-browser or "
                                     "google-chrome on PATH, or $EMULANT_CHROMIUM.")
    pd_.add_argument("report", metavar="REPORT.html", help="a report written by the workflow")
    pd_.add_argument("--out", metavar="FILE", help="the PDF to write (default: beside the report)")
    pd_.set_defaults(func=cmd_pdf)

    sub.add_parser("run", help="run the workflow unattended: one run per folder, recovers from "
                               "an interrupted run, then prints where the report is",
                   description="emulant run [SNAKEMAKE OPTIONS]: runs snakemake with "
                               "--rerun-incomplete and the given options (e.g. --cores 2 --config "
                               "extract=PATH protocol=FILE). A second run of the same folder "
                               "stops at once; a stale lock left by a killed run is removed "
                               "only when no run of the folder is alive. Ends by printing the "
                               "results and report of the study that was run. Exit code: "
                               "snakemake's, or 2.")
    return parser


def cmd_run(rest: Sequence[str]) -> int:
    """Run the workflow under :func:`emulant.runner.run_workflow`, then print where its report is."""
    from emulant.runner import RunBusy, config_args, run_workflow

    try:
        code = run_workflow(rest, Path.cwd(), say=lambda m: print(m, file=sys.stderr))
    except RunBusy as exc:
        print(f"emulant run: {exc}", file=sys.stderr)
        return EXIT_PROBLEMS
    if code != 0 or any(a in ("-n", "--dry-run", "--dryrun") for a in rest):
        return code if code else EXIT_OK
    opts = config_args(rest)
    files = [opts[i + 1] for i, a in enumerate(opts[:-1]) if a == "--configfile"]
    items = [a for a in opts if not a.startswith("-") and "=" in a]
    where = ["where"] + (["--configfile", files[-1]] if files else []) + (["--config", *items] if items else [])
    return main(where)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of ``emulant``; returns the exit code (0, or 2 on any problem)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv[:1] == ["run"] and not set(argv[1:2]) & {"-h", "--help"}:
        return cmd_run(argv[1:])  # everything after `run` is Snakemake's
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help (0) or a usage error (2): argparse has printed it
        return int(exc.code or 0) if not isinstance(exc.code, str) else EXIT_PROBLEMS
    try:
        return args.func(args)
    except _Failed:
        return EXIT_PROBLEMS


if __name__ == "__main__":
    raise SystemExit(main())
