"""Snakemake adapter: build the multiscale pyramid of one dataset."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.pyramid import pyramid_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    pyramid_job,
    image_path=snakemake.input.image,
    out_path=snakemake.output.image,
    levels=snakemake.params.levels,
    downsample_z=snakemake.params.downsample_z,
)
