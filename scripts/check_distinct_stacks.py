"""Snakemake adapter: refuse two datasets holding one stack, before the statistics count animals."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.distinct_stacks import check_distinct_stacks_job
from tessera.workflow.runner import run_job

stacks = snakemake.params.stacks
run_job(
    snakemake,
    check_distinct_stacks_job,
    checksums=dict(zip(stacks, snakemake.input.checksums, strict=True)),
    stacks=stacks,
    out_path=snakemake.output.check,
    sheet=snakemake.params.sheet,
)
