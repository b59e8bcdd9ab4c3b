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
    log:
        logfile("build_cohort"),
    script:
        "../../scripts/build_cohort.py"
