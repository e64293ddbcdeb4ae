"""Snakemake adapter: score one target's stitched objects in 3D on the held-out sections."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.evaluate_objects import evaluate_objects_job
from tessera.workflow.runner import run_job

datasets = list(snakemake.params.datasets)
# the datasets with an instance volume; the others are scored against their labels' components
instances = dict(zip(snakemake.params.instance_datasets, snakemake.input.instances, strict=True))
inputs = {
    dataset: {
        "objects": objects,
        "pyramid": pyramid,
        "labels": labels,
        "qc": qc,
        **({"instances": instances[dataset]} if dataset in instances else {}),
    }
    for dataset, objects, pyramid, labels, qc in zip(
        datasets,
        snakemake.input.objects,
        snakemake.input.images,
        snakemake.input.labels,
        snakemake.input.qc,
        strict=True,
    )
}
run_job(
    snakemake,
    evaluate_objects_job,
    annotations=snakemake.input.tiles,
    inputs=inputs,
    out_table=snakemake.output.table,
    out_plot=snakemake.output.plot,
    out_crops=snakemake.output.crops,
    target=snakemake.wildcards.target,
    guard_sections=snakemake.params.guard_sections,
    sections=snakemake.params.annotated_sections,
)
