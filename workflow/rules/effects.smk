rule estimate_effects:
    input:
        cohort=result("cohort.parquet"),
        weights=result("weights.parquet"),
        protocol=PROTOCOL_FILES,
    output:
        estimates=result("estimates.csv"),
        curves=result("curves.csv"),
        bootstrap=result("bootstrap.json"),
    params:
        workers=WORKERS,
    threads: WORKERS
    log:
        logfile("estimate_effects"),
    script:
        "../../scripts/estimate_effects.py"
