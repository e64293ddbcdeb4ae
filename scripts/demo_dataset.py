"""Snakemake adapter: render one dataset of the synthetic demo study."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.runner import run_job
from tessera_demo.files import write_dataset
from tessera_demo.study import dataset_seed, subject_volume_scale

params = snakemake.params
# The built-in effect: the condition's factor times this animal's own (log-normal) factor.
volume_scale = subject_volume_scale(
    params.subject,
    params.condition,
    study_seed=params.study_seed,
    condition_scales={params.condition: params.condition_volume_scale},
    animal_sd=params.animal_sd,
)
run_job(
    snakemake,
    write_dataset,
    out_dir=Path(snakemake.output.raw).parent,
    dataset=snakemake.wildcards.dataset,
    condition=snakemake.params.condition,
    subject=snakemake.params.subject,
    seed=dataset_seed(snakemake.params.study_seed, snakemake.wildcards.dataset),
    shape=tuple(snakemake.params.shape),
    spacing=tuple(snakemake.params.spacing),
    mito_volume_scale=volume_scale,
    tile_size=snakemake.params.tile_size,
)
