"""Rule compile_appendix: appendix.pdf with pdflatex."""

from fegrid.pipeline import compile_appendix, run_logged

snakemake = globals()["snakemake"]
run_logged(snakemake.log[0], compile_appendix, snakemake.input.tex, snakemake.output.pdf)
