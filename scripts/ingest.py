"""Snakemake adapter: ingest one dataset's stack into a single-level OME-Zarr image."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    ingest_job,
    source_path=snakemake.input.stack,
    out_path=snakemake.output.image,
    fmt=snakemake.params.format,
    internal_path=snakemake.params.internal_path,
    spacing=snakemake.params.spacing,
    name=snakemake.wildcards.dataset,
    chunks=snakemake.params.chunks,
    percentiles=snakemake.params.percentiles,
    missing_sections=snakemake.params.missing_sections,
    missing_chunks=snakemake.params.missing_chunks,
    checked=snakemake.input.check,
)
