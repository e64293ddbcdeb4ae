"""Snakemake adapter: check one target's label volume of one dataset whole, before its tiles."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.sample_tiles import check_labels_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    check_labels_job,
    labels_path=snakemake.input.labels,
    instances_path=snakemake.input.instances[0] if snakemake.input.instances else None,
    image_path=snakemake.input.image,
    out_path=snakemake.output.check,
    target=snakemake.wildcards.target,
    pyramid_path=snakemake.input.pyramid,
    downsample=snakemake.params.downsample,
    sections=snakemake.params.annotated_sections,
)
