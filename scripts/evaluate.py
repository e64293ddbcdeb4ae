"""Snakemake adapter: score one target's test tiles."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.evaluate import evaluate_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    evaluate_job,
    annotations=snakemake.input.tiles,
    probabilities=snakemake.input.probabilities,
    pyramids=dict(zip(snakemake.params.datasets, snakemake.input.images, strict=False)),
    out_summary=snakemake.output.summary,
    out_tiles=snakemake.output.tiles,
    out_curve=snakemake.output.curve,
    out_curve_plot=snakemake.output.curve_plot,
    out_tiles_plot=snakemake.output.tiles_plot,
    out_overlays=snakemake.output.overlays,
    target=snakemake.wildcards.target,
    downsample=snakemake.params.downsample,
)
