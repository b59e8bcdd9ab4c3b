rule fit_weights:
    input:
        cohort=result("cohort.parquet"),
        protocol=PROTOCOL_FILES,
    output:
        weights=result("weights.parquet"),
        positivity=result("positivity.json"),
    resources:
        mem_mb=mem_mb("fit_weights"),
        runtime=runtime("fit_weights"),
    log:
        logfile("fit_weights"),
    script:
        "../../scripts/fit_weights.py"


rule check_balance:
    input:
        cohort=result("cohort.parquet"),
        weights=result("weights.parquet"),
        protocol=PROTOCOL_FILES,
    output:
        balance=result("balance.csv"),
    resources:
        mem_mb=mem_mb("check_balance"),
        runtime=runtime("check_balance"),
    log:
        logfile("check_balance"),
    script:
        "../../scripts/check_balance.py"
