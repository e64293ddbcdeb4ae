"""Snakemake adapter: sample one target's annotation tiles of one dataset from its label volume."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.sample_tiles import sample_tiles_job
from tessera.workflow.runner import run_job

tiles = snakemake.params.tiles
run_job(
    snakemake,
    sample_tiles_job,
    labels_path=snakemake.input.labels,
    image_path=snakemake.input.image,
    qc_table=snakemake.input.qc,
    labels_check=snakemake.input.check,
    out_dir=snakemake.output.tiles,
    dataset=snakemake.wildcards.dataset,
    target=snakemake.wildcards.target,
    downsample=snakemake.params.downsample,
    size=tiles["size"],
    count=tiles["per_dataset"],
    seed=tiles["seed"],
    min_fraction=tiles["min_target_fraction"],
    allow_fewer=tiles["allow_fewer"],
    sections=snakemake.params.annotated_sections,
)
