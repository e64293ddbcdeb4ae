"""Snakemake adapter: suggest the next tiles to annotate for one target."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.next_tiles import next_tiles_job
from tessera.workflow.runner import run_job

datasets = snakemake.params.datasets
run_job(
    snakemake,
    next_tiles_job,
    probabilities=dict(zip(datasets, snakemake.input.probabilities, strict=False)),
    annotations=snakemake.input.tiles,
    qc_tables=dict(zip(datasets, snakemake.input.qc, strict=False)),
    out_points=snakemake.output.points,
    out_preview=snakemake.output.preview,
    target=snakemake.wildcards.target,
    size=snakemake.params.size,
    count=snakemake.params.suggest["count"],
    min_sections=snakemake.params.suggest["min_sections"],
    held_out=snakemake.params.held_out,
    guard_sections=snakemake.params.guard,
)
