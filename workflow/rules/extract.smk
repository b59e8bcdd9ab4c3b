rule check_extract:
    input:
        tables=EXTRACT_FILES,
        protocol=PROTOCOL_FILES,
    output:
        check=result("extract_check.json"),
        examples=result("person_level/extract_examples.json"),
    params:
        duckdb=DUCKDB,
    resources:
        mem_mb=mem_mb("check_extract"),
        runtime=runtime("check_extract"),
    log:
        logfile("check_extract"),
    script:
        "../../scripts/check_extract.py"
