"""Snakemake adapter: check one dataset's stack whole before it is ingested."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.ingest import check_stack_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    check_stack_job,
    source_path=snakemake.input.stack,
    out_path=snakemake.output.check,
    fmt=snakemake.params.format,
    internal_path=snakemake.params.internal_path,
    spacing=snakemake.params.spacing,
    missing_sections=snakemake.params.missing_sections,
    earlier_image=snakemake.params.earlier_image,
)
