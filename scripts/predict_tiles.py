"""Snakemake adapter: predict and score one target's validation and test tiles."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.train import predict_tiles_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    predict_tiles_job,
    annotations=snakemake.input.tiles,
    pyramids=dict(zip(snakemake.params.datasets, snakemake.input.images, strict=False)),
    qc_tables=dict(zip(snakemake.params.datasets, snakemake.input.qc, strict=True)),
    model_paths=list(snakemake.input.models),
    out_probabilities=snakemake.output.probabilities,
    out_table=snakemake.output.scores,
    target=snakemake.wildcards.target,
    downsample=snakemake.params.downsample,
    output_sigma=snakemake.params.output_sigma,
    output_smoothing_sections=snakemake.params.output_smoothing_sections,
)
