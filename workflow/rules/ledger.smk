# Gathering: every job's results joined with the grid's names, sorted by spec id.


rule gather_ledger:
    # the ledger, its summary and its figures come before any bootstrap draw
    priority: 50
    input:
        snapshot=str(PLAN.snapshot_path),
        fits=[str(p) for p in PLAN.fit_paths()],
    output:
        csv=str(PLAN.paths.ledger_csv),
        parquet=str(PLAN.paths.ledger_parquet),
        coefficients=str(PLAN.paths.coefficients_parquet),
        coefficients_csv=str(PLAN.paths.coefficients_csv),
        timings=str(PLAN.paths.timings),
    params:
        grid_digest=GRID_DIGEST,
        root=lambda wildcards, output: str(RunPaths.of_file(output.csv).root),
    log:
        log_of("gather_ledger"),
    benchmark:
        benchmark_of("gather_ledger")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/gather_ledger.py"
