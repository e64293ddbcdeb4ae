"""Snakemake adapter: surface meshes and a preview of one dataset's objects."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.meshes import meshes_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    meshes_job,
    objects_image=snakemake.input.image,
    measured_table=snakemake.input.table,
    out_ply=snakemake.output.ply,
    out_preview=snakemake.output.preview,
    target=snakemake.wildcards.target,
    step=snakemake.params.step,
    unit=snakemake.params.unit,
    preview_objects=snakemake.params.preview_objects,
)
