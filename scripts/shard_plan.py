"""Snakemake adapter: plan the prediction blocks of one dataset and target."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.predict import shard_plan_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    shard_plan_job,
    pyramid=snakemake.input.image,
    model_paths=list(snakemake.input.models),
    out_plan=snakemake.output.plan,
    target=snakemake.wildcards.target,
    downsample=snakemake.params.downsample,
    block=snakemake.params.block,
    shard_jobs=snakemake.params.shard_jobs,
    max_halo=snakemake.params.max_halo,
    dtype=snakemake.params.dtype,
    output_sigma=snakemake.params.output_sigma,
    output_smoothing_sections=snakemake.params.output_smoothing_sections,
    qc_table=snakemake.input.qc,
)
