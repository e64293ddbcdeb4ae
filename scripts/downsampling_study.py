"""Snakemake adapter: accuracy against downsampling factor for one target."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.downsampling_study import downsampling_study_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    downsampling_study_job,
    summaries=list(snakemake.input.summaries),
    factors=snakemake.params.factors,
    out_curve=snakemake.output.curve,
    out_plot=snakemake.output.plot,
    target=snakemake.wildcards.target,
    tolerance=snakemake.params.tolerance,
    pyramids=list(snakemake.input.pyramids),
)
