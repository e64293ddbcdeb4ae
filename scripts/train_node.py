"""Snakemake adapter: train one (stage, level) node of a target's cascade."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.train import train_node_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    train_node_job,
    annotations=snakemake.input.tiles,
    pyramids=dict(zip(snakemake.params.datasets, snakemake.input.images, strict=False)),
    qc_tables=dict(zip(snakemake.params.datasets, snakemake.input.qc, strict=True)),
    upstream=list(snakemake.input.upstream),
    out_path=snakemake.output.model,
    target=snakemake.wildcards.target,
    downsample=snakemake.params.downsample,
    cascade=snakemake.params.cascade,
    stage=int(snakemake.wildcards.stage),
    level=int(snakemake.wildcards.level),
    threads=snakemake.threads,
    train_datasets=snakemake.params.train_datasets,
)
