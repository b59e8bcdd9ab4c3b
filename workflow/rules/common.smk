# Paths only: the study id, the input files, and where each result lives. No statistics here.
from pathlib import Path

from emulant import paths as emulant_paths

SYNTHETIC_DEFAULT = "resources/synthetic"
# the invented extracts the workflow writes itself: folder -> generator scenario
SYNTHETIC_SCENARIOS = {SYNTHETIC_DEFAULT: "demo", "resources/synthetic-designs": "designs"}
EXTRACT = config["extract"]
PROTOCOL = config["protocol"]
SCENARIO = next((s for d, s in SYNTHETIC_SCENARIOS.items() if Path(EXTRACT) == Path(d)), None)
IS_SYNTHETIC = SCENARIO is not None
PROTOCOL_PARSED = emulant_paths.protocol(PROTOCOL)  # parsed once here; each job parses its own copy
STUDY = PROTOCOL_PARSED.study.id
RESULTS = f"{config.get('results', 'results')}/{STUDY}"
REPORTS = f"{config.get('reports', 'reports')}/{STUDY}"
EXTRACT_FILES = emulant_paths.extract_files(EXTRACT, synthetic=IS_SYNTHETIC)
PROTOCOL_FILES = emulant_paths.protocol_files(PROTOCOL_PARSED)
DUCKDB = config.get("duckdb", {})
WORKERS = config.get("workers", 2)
BOOTSTRAP_CHUNKS = emulant_paths.bootstrap_chunks(PROTOCOL_PARSED, config.get("bootstrap_chunks"))
PER_PROTOCOL = PROTOCOL_PARSED.per_protocol  # person-time results only when it is asked for
# Cluster jobs ask for memory (MB) and time (minutes) scaled from the extract's size; a local
# run ignores both unless --resources caps them.
SIZE = emulant_paths.job_size(EXTRACT_FILES, config.get("synthetic", {}).get("persons", 20000))


def result(name):
    return f"{RESULTS}/{name}"


def logfile(name):
    return f"{RESULTS}/logs/{name}.log"


def job_threads(wildcards, threads):
    """A rule's threads as Snakemake gave them (scaled down to --cores): its worker processes."""
    return threads


def person_time_results():
    """person_periods.parquet when the protocol asks for per_protocol, else nothing."""
    return [result("person_periods.parquet")] if PER_PROTOCOL else []


def weighted_periods_result():
    """periods.parquet (the person-periods with their weights) when the protocol asks for
    per_protocol, else nothing: an output of estimate_point."""
    return {"periods": result("periods.parquet")} if PER_PROTOCOL else {}


def mem_mb(rule):
    return SIZE[rule]["mem_mb"]


def runtime(rule):
    return SIZE[rule]["runtime"]
