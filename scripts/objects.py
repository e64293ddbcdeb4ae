"""Snakemake adapter: filter one probability map into labelled objects."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.objects import objects_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    objects_job,
    probability=snakemake.input.probability,
    qc_table=snakemake.input.qc,
    scores=snakemake.input.scores,
    out_image=snakemake.output.image,
    out_table=snakemake.output.table,
    out_settings=snakemake.output.settings,
    target=snakemake.wildcards.target,
    settings=snakemake.params.settings,
)
