# Fitting: one snapshot of the data, then one job per block group (named by content hash).


rule snapshot_data:
    # the ledger, its summary and its figures come before any bootstrap draw
    priority: 50
    output:
        snapshot=str(PLAN.snapshot_path),
    params:
        # the hash the run was planned with: a data file replaced since then is refused
        data_sha256=PLAN.data_sha256,
    log:
        log_of("snapshot_data"),
    benchmark:
        benchmark_of("snapshot_data")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/snapshot_data.py"


rule fit_job:
    # the ledger, its summary and its figures come before any bootstrap draw
    priority: 50
    input:
        snapshot=str(PLAN.snapshot_path),
    output:
        results=str(PLAN.paths.fit("{job}")),
        work=str(PLAN.paths.work_log("{job}")),
    params:
        # the run's cache folder: fits/ sits beside demeaned/ and results/
        store=lambda wildcards, output: str(RunPaths.of_file(output.results, depth=3).cache),
    log:
        log_of("fit_job", "{job}"),
    benchmark:
        benchmark_of("fit_job", "{job}")
    wildcard_constraints:
        job="[0-9a-f]{16}",
    resources:
        mem_mb=fit_mem_mb,
        runtime=fit_runtime,
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/fit_job.py"
