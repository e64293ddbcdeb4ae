"""Snakemake adapter: merge one target's tiles of every dataset and split them by section."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.split_tiles import split_tiles_job
from tessera.workflow.runner import run_job

split = snakemake.params.split
run_job(
    snakemake,
    split_tiles_job,
    annotation_dirs=list(snakemake.input.tiles),
    out_dir=snakemake.output.tiles,
    fractions=split["fractions"],
    guard_sections=split["guard_sections"],
    seed=split["seed"],
    test_datasets=split["test_datasets"],
    train_tiles=snakemake.params.train_tiles,
)
