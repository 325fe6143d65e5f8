# Reports: figures, summaries, joint tests, the LaTeX appendix and provenance, all from the ledger.


rule draw_curve:
    # the ledger, its summary and its figures come before any bootstrap draw; one job draws every
    # curve (matplotlib loads once: a job per figure spent most of its time starting up)
    priority: 50
    input:
        ledger=str(PLAN.paths.ledger_parquet),
    output:
        png=[report(str(p), caption="../report/curve.rst", category="Specification curves")
             for p in PLAN.figure_paths("png")],
        pdf=[str(p) for p in PLAN.figure_paths("pdf")],
    log:
        log_of("draw_curve"),
    benchmark:
        benchmark_of("draw_curve")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/draw_curve.py"


rule summarise_curve:
    # the ledger, its summary and its figures come before any bootstrap draw
    priority: 50
    input:
        ledger=str(PLAN.paths.ledger_parquet),
    output:
        csv=report(PLAN.paths.file("summary.csv"), caption="../report/summary.rst", category="Tables"),
        md=PLAN.paths.file("summary.md"),
        tex=PLAN.paths.file("summary.tex"),
        choices=PLAN.paths.file("choices.csv"),
        influence=PLAN.paths.file("influence.csv"),
    log:
        log_of("summarise_curve"),
    benchmark:
        benchmark_of("summarise_curve")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/summarise_curve.py"


rule draw_adoption:
    # a staggered design's event study and decomposition: part of the first answer too
    priority: 50
    input:
        ledger=str(PLAN.paths.ledger_parquet),
        coefficients=str(PLAN.paths.coefficients_parquet),
    output:
        event_png=report(
            str(PLAN.paths.adoption_figure("event", "{design}", "png")),
            caption="../report/event.rst",
            category="Staggered adoption",
        ),
        event_pdf=str(PLAN.paths.adoption_figure("event", "{design}", "pdf")),
        decomposition_png=str(PLAN.paths.adoption_figure("decomposition", "{design}", "png")),
        decomposition_pdf=str(PLAN.paths.adoption_figure("decomposition", "{design}", "pdf")),
    log:
        log_of("draw_adoption", "{design}"),
    benchmark:
        benchmark_of("draw_adoption", "{design}")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/draw_adoption.py"


rule draw_null_curves:
    input:
        snapshot=str(PLAN.snapshot_path),
        # the first answer comes first: no draw starts before the ledger, its summary and its figures
        # exist (ancient: their time stamps never make the draws, which do not read them, run again)
        first_answer=[ancient(p) for p in first_answer()],
    output:
        draws=str(PLAN.paths.joint_draws("{key}", "{chunk}")),
    log:
        log_of("draw_null_curves", "{key}-{chunk}"),
    benchmark:
        benchmark_of("draw_null_curves", "{key}-{chunk}")
    wildcard_constraints:
        key="[0-9a-f]{16}",
        chunk="[0-9]{4}",
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/draw_null_curves.py"


rule test_curve:
    input:
        ledger=str(PLAN.paths.ledger_parquet),
        draws=[str(p) for p in PLAN.joint_paths()],
    output:
        csv=report(PLAN.paths.file("joint_tests.csv"), caption="../report/joint.rst", category="Tables"),
        md=PLAN.paths.file("joint_tests.md"),
    log:
        log_of("test_curve"),
    benchmark:
        benchmark_of("test_curve")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/test_curve.py"


rule render_appendix:
    input:
        ledger=str(PLAN.paths.ledger_parquet),
        joint=PLAN.paths.file("joint_tests.csv"),
        figures=[str(p) for p in PLAN.figure_paths("pdf")],
        adoption=[str(p) for p in PLAN.adoption_figure_paths("pdf")],
    output:
        tex=PLAN.paths.file("appendix.tex"),
        # the results tables (tables.<name> in the config), each as .tex, .md and .html
        **{f"table_{name}_{ending}": str(path) for name, files in PLAN.table_paths().items()
           for ending, path in files.items()},
    log:
        log_of("render_appendix"),
    benchmark:
        benchmark_of("render_appendix")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/render_appendix.py"


rule compile_appendix:
    input:
        tex=PLAN.paths.file("appendix.tex"),
        figures=[str(p) for p in PLAN.figure_paths("pdf")],
        adoption=[str(p) for p in PLAN.adoption_figure_paths("pdf")],
    output:
        pdf=report(PLAN.paths.file("appendix.pdf"), caption="../report/appendix.rst", category="Appendix"),
    log:
        log_of("compile_appendix"),
    benchmark:
        benchmark_of("compile_appendix")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/compile_appendix.py"


rule write_provenance:
    input:
        unpack(report_outputs),
    output:
        **PLAN.paths.provenance_files(),
    params:
        benchmarks=benchmark_files(),
        config_path=CONFIG_PATH,
        specs=PLAN.n_specs,
        # the snapshot records the hash of the bytes that were fitted
        snapshot=str(PLAN.snapshot_path),
    log:
        log_of("write_provenance"),
    benchmark:
        benchmark_of("write_provenance")
    conda:
        "../envs/fegrid.yaml"
    script:
        "../scripts/write_provenance.py"
