rule check_extract:
    input:
        tables=EXTRACT_FILES,
        protocol=PROTOCOL_FILES,
    output:
        check=result("extract_check.json"),
    params:
        duckdb=DUCKDB,
    log:
        logfile("check_extract"),
    script:
        "../../scripts/check_extract.py"
