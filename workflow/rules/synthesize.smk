# An invented extract, written only when `extract` is one of the built-in synthetic folders
# (resources/synthetic: the demo; resources/synthetic-designs: the index-flare scenario).
if IS_SYNTHETIC:

    rule synthesize_extract:
        output:
            tables=EXTRACT_FILES,
            truth=f"{EXTRACT}/truth.json",
        params:
            persons=config.get("synthetic", {}).get("persons", 20000),
            seed=config.get("synthetic", {}).get("seed", 20261201),
            scenario=SCENARIO,
        resources:
            mem_mb=mem_mb("synthesize_extract"),
            runtime=runtime("synthesize_extract"),
        log:
            f"{EXTRACT}/synthesize.log",
        script:
            "../../scripts/synthesize_extract.py"
