"""Snakemake adapter: check every painted mask of one target, over all its datasets."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.import_tiles import check_masks_job
from tessera.workflow.runner import run_job

datasets = list(snakemake.params.datasets)
run_job(
    snakemake,
    check_masks_job,
    exported=dict(zip(datasets, snakemake.input.exported, strict=True)),
    masks_dir=snakemake.params.masks,
    pyramids=dict(zip(datasets, snakemake.input.images, strict=True)),
    qc_tables=dict(zip(datasets, snakemake.input.qc, strict=True)),
    out_path=snakemake.output.check,
    painted_on=snakemake.params.painted_on,
    **snakemake.params.painted,
)
