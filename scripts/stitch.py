"""Snakemake adapter: verify the shard outputs and stitch the probability map."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.predict import stitch_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    stitch_job,
    plan_path=snakemake.input.plan,
    shard_dirs=list(snakemake.input.shards),
    out_path=snakemake.output.image,
    viewing_levels=snakemake.params.viewing_levels,
)
