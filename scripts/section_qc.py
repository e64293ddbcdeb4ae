"""Snakemake adapter: per-section quality control of one dataset."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.section_qc import section_qc_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    section_qc_job,
    image_path=snakemake.input.image,
    table_path=snakemake.output.table,
    plot_path=snakemake.output.plot,
    title=snakemake.wildcards.dataset,
    **snakemake.params.qc,
)
