"""Snakemake adapter: pick the rung of a target's cascade ladder that the predictions use."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.ladder import choose_rung_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    choose_rung_job,
    score_paths=list(snakemake.input.scores),
    out_choice=snakemake.output.choice,
    out_plot=snakemake.output.plot,
    target=snakemake.wildcards.target,
)
