rule fit_weights:
    input:
        cohort=result("cohort.parquet"),
        protocol=PROTOCOL_FILES,
    output:
        weights=result("weights.parquet"),
        positivity=result("positivity.json"),
    params:
        protocol=PROTOCOL,
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
    params:
        protocol=PROTOCOL,
    log:
        logfile("check_balance"),
    script:
        "../../scripts/check_balance.py"
