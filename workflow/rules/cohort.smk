rule build_cohort:
    input:
        check=result("extract_check.json"),
        tables=EXTRACT_FILES,
        protocol=PROTOCOL_FILES,
    output:
        cohort=result("cohort.parquet"),
        attrition=result("attrition.csv"),
    params:
        duckdb=DUCKDB,
    resources:
        mem_mb=mem_mb("build_cohort"),
        runtime=runtime("build_cohort"),
    log:
        logfile("build_cohort"),
    script:
        "../../scripts/build_cohort.py"


# person-periods (CONTRACTS §5a, §5g): only when the protocol asks for per_protocol; estimate_point
# writes them again as periods.parquet with the weights over time it used
rule build_periods:
    input:
        cohort=result("cohort.parquet"),
        tables=EXTRACT_FILES,
        protocol=PROTOCOL_FILES,
    output:
        periods=result("person_periods.parquet"),
    params:
        duckdb=DUCKDB,
    resources:
        mem_mb=mem_mb("build_periods"),
        runtime=runtime("build_periods"),
    log:
        logfile("build_periods"),
    script:
        "../../scripts/build_periods.py"
