"""Snakemake adapter: score one rung of a target's cascade ladder on the validation tiles."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.ladder import score_rung_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    score_rung_job,
    annotations=snakemake.input.tiles,
    pyramids=dict(zip(snakemake.params.datasets, snakemake.input.images, strict=False)),
    qc_tables=dict(zip(snakemake.params.datasets, snakemake.input.qc, strict=True)),
    model_paths=list(snakemake.input.models),
    out_score=snakemake.output.score,
    target=snakemake.wildcards.target,
    downsample=snakemake.params.downsample,
    stages=int(snakemake.wildcards.stages),
    levels=int(snakemake.wildcards.levels),
    output_sigma=snakemake.params.output_sigma,
    output_smoothing_sections=snakemake.params.output_smoothing_sections,
)
