rule render_report:
    input:
        check=result("extract_check.json"),
        attrition=result("attrition.csv"),
        cohort=result("cohort.parquet"),
        weights=result("weights.parquet"),
        positivity=result("positivity.json"),
        balance=result("balance.csv"),
        # The gathered files are identical whatever the bootstrap chunking (config key
        # bootstrap_chunks), so regathering them after a change of chunking alone does not
        # rerender (ancient); the point estimate, which changes with anything they depend on,
        # does.
        point=result("bootstrap/point.json"),
        adherence=result("adherence.csv"),
        estimates=ancient(result("estimates.csv")),
        curves=ancient(result("curves.csv")),
        bootstrap=ancient(result("bootstrap.json")),
        decision=ancient(result("decision.csv")),
        protocol=PROTOCOL_FILES,
    output:
        report=result("report.html"),
        manifest=result("manifest.json"),
    params:
        reports=REPORTS,
        design=False,
    resources:
        mem_mb=mem_mb("render_report"),
        runtime=runtime("render_report"),
    log:
        logfile("render_report"),
    script:
        "../../scripts/render_report.py"


rule archive_report:
    input:
        check=result("extract_check.json"),
        report=result("report.html"),
        manifest=result("manifest.json"),
        protocol=PROTOCOL_FILES,
    output:
        archived=result("archive.json"),
    params:
        reports=REPORTS,
    resources:
        mem_mb=mem_mb("archive_report"),
        runtime=runtime("archive_report"),
    log:
        logfile("archive_report"),
    script:
        "../../scripts/archive_report.py"


rule render_design:
    input:
        check=result("extract_check.json"),
        attrition=result("attrition.csv"),
        cohort=result("cohort.parquet"),
        weights=result("weights.parquet"),
        positivity=result("positivity.json"),
        balance=result("balance.csv"),
        protocol=PROTOCOL_FILES,
    output:
        report=result("design/report.html"),
        manifest=result("design/manifest.json"),
    params:
        reports=REPORTS,
        design=True,
    resources:
        mem_mb=mem_mb("render_design"),
        runtime=runtime("render_design"),
    log:
        logfile("render_design"),
    script:
        "../../scripts/render_report.py"


rule archive_design:
    input:
        check=result("extract_check.json"),
        report=result("design/report.html"),
        manifest=result("design/manifest.json"),
        protocol=PROTOCOL_FILES,
    output:
        archived=result("design_archive.json"),
    params:
        reports=REPORTS,
    resources:
        mem_mb=mem_mb("archive_design"),
        runtime=runtime("archive_design"),
    log:
        logfile("archive_design"),
    script:
        "../../scripts/archive_report.py"
