"""Snakemake adapter: the methods paragraph of the study."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.methods import methods_job
from tessera.workflow.runner import run_job

targets, datasets = snakemake.params.targets, snakemake.params.dataset_ids
objects = list(snakemake.input.objects)  # ordered target-major by expand()
run_job(
    snakemake,
    methods_job,
    config_sections=snakemake.params.sections,
    sheet_rows=snakemake.params.datasets,
    scores=dict(zip(targets, snakemake.input.scores, strict=True)),
    object_settings={
        t: objects[i * len(datasets) : (i + 1) * len(datasets)] for i, t in enumerate(targets)
    },
    comparisons=dict(zip(targets, snakemake.input.comparisons, strict=True)),
    checksums=list(snakemake.input.checksums),
    qc_tables=list(snakemake.input.qc),
    ingest_images=dict(zip(datasets, snakemake.input.ingest, strict=True)),
    annotated=dict(snakemake.params.annotated),
    out_path=snakemake.output[0],
    ladder=dict(zip(snakemake.params.ladder_targets, snakemake.input.ladder, strict=True)),
    first_nodes=dict(zip(targets, snakemake.input.first_nodes, strict=True)),
    objects_3d=dict(
        zip(snakemake.params.objects_3d_targets, snakemake.input.objects_3d, strict=True)
    ),
)
