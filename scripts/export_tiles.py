"""Snakemake adapter: cut one dataset's tiles of a target around the points, for painting."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.export_tiles import export_tiles_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    export_tiles_job,
    image_path=snakemake.input.image,
    points_path=snakemake.input.points,
    out_dir=snakemake.output.tiles,
    dataset=snakemake.wildcards.dataset,
    target=snakemake.wildcards.target,
    downsample=snakemake.params.downsample,
    size=snakemake.params.size,
    datasets=snakemake.params.datasets,
    targets=snakemake.params.targets,
)
