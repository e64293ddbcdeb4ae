"""Snakemake adapter: predict the blocks of one shard job."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.predict import predict_shard_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    predict_shard_job,
    plan_path=snakemake.input.plan,
    pyramid=snakemake.input.image,
    model_paths=list(snakemake.input.models),
    out_dir=snakemake.output.shard,
    job=int(snakemake.wildcards.job),
    target=snakemake.wildcards.target,
    mem_mb=snakemake.resources.mem_mb,
)
