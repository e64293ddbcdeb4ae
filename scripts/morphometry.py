"""Snakemake adapter: measure the objects of one dataset and target."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.morphometry import morphometry_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    morphometry_job,
    objects_image=snakemake.input.image,
    objects_table=snakemake.input.table,
    out_objects=snakemake.output.objects,
    out_regions=snakemake.output.regions,
    target=snakemake.wildcards.target,
    roi_mask=snakemake.input.roi[0] if snakemake.input.roi else None,
    roi_check=snakemake.input.roi_check[0] if snakemake.input.roi_check else None,
    raw_image=snakemake.input.raw,
)
