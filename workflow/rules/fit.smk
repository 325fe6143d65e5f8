# Fitting: one snapshot of the data, then one job per block group (named by content hash).


rule snapshot_data:
    output:
        snapshot=str(PLAN.snapshot_path),
    params:
        # the hash the run was planned with: a data file replaced since then is refused
        data_sha256=PLAN.data_sha256,
    log:
        f"{RUN}/logs/snapshot_data.log",
    benchmark:
        f"{RUN}/benchmarks/snapshot_data/all.tsv"
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/snapshot_data.py"


rule fit_job:
    input:
        snapshot=str(PLAN.snapshot_path),
    output:
        results=f"{RUN}/cache/fits/{{job}}.parquet",
        work=f"{RUN}/cache/fits/{{job}}.json",
    params:
        # the run's cache folder: fits/ sits beside demeaned/ and results/
        store=lambda wildcards, output: str(Path(output.results).parent.parent),
    log:
        f"{RUN}/logs/fit_job/{{job}}.log",
    benchmark:
        f"{RUN}/benchmarks/fit_job/{{job}}.tsv"
    wildcard_constraints:
        job="[0-9a-f]{16}",
    resources:
        mem_mb=fit_mem_mb,
        runtime=fit_runtime,
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/fit_job.py"
