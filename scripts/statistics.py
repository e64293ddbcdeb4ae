"""Snakemake adapter: per-animal summaries and condition comparisons of one target."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.statistics import statistics_job
from tessera.workflow.runner import run_job

datasets = snakemake.params.datasets
run_job(
    snakemake,
    statistics_job,
    object_tables=dict(zip(datasets, snakemake.input.objects, strict=True)),
    region_tables=dict(zip(datasets, snakemake.input.regions, strict=True)),
    datasets=datasets,
    scores=snakemake.input.scores,
    stacks_check=snakemake.input.stacks_check,
    objects_3d=snakemake.input.get("objects_3d"),
    out_animals=snakemake.output.animals,
    out_comparison=snakemake.output.comparison,
    out_plot=snakemake.output.plot,
    out_conditions=snakemake.output.conditions,
    target=snakemake.wildcards.target,
    measures=snakemake.params.statistics["measures"],
    reference=snakemake.params.statistics["reference_condition"],
    confidence=snakemake.params.statistics["confidence"],
)
