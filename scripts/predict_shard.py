"""Snakemake adapter: predict the blocks of one shard job."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.jobs import run_job
from tessera.predict import predict_shard_job

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
