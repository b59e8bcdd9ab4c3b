# The estimation stage as separate jobs a scheduler can spread: the point estimate, one job per
# chunk of bootstrap replicates (config key bootstrap_chunks), and the gather step.


rule estimate_point:
    input:
        cohort=result("cohort.parquet"),
        periods=person_time_results(),
        protocol=PROTOCOL_FILES,
    output:
        point=result("bootstrap/point.json"),
        adherence=result("adherence.csv"),
        **weighted_periods_result(),
    resources:
        mem_mb=mem_mb("estimate_point"),
        runtime=runtime("estimate_point"),
    log:
        logfile("estimate_point"),
    script:
        "../../scripts/estimate_point.py"


rule bootstrap_chunk:
    input:
        cohort=result("cohort.parquet"),
        periods=person_time_results(),
        point=result("bootstrap/point.json"),
        protocol=PROTOCOL_FILES,
    output:
        chunk=result("bootstrap/replicates_{first}-{last}.npz"),
    wildcard_constraints:
        first=r"\d+",
        last=r"\d+",
    params:
        first="{first}",
        last="{last}",
        workers=job_threads,
    threads: WORKERS
    resources:
        mem_mb=mem_mb("bootstrap_chunk"),
        runtime=runtime("bootstrap_chunk"),
    log:
        logfile("bootstrap_{first}-{last}"),
    script:
        "../../scripts/bootstrap_chunk.py"


rule estimate_effects:
    input:
        point=result("bootstrap/point.json"),
        chunks=[result(f"bootstrap/{name}") for name in BOOTSTRAP_CHUNKS],
        protocol=PROTOCOL_FILES,
    output:
        estimates=result("estimates.csv"),
        curves=result("curves.csv"),
        bootstrap=result("bootstrap.json"),
        decision=result("decision.csv"),
    resources:
        mem_mb=mem_mb("estimate_effects"),
        runtime=runtime("estimate_effects"),
    log:
        logfile("estimate_effects"),
    script:
        "../../scripts/estimate_effects.py"
