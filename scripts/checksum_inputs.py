"""Snakemake adapter: SHA-256 of one dataset's input files."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.checksum_inputs import checksum_inputs_job
from tessera.workflow.runner import run_job

run_job(snakemake, checksum_inputs_job, paths=list(snakemake.input), out_path=snakemake.output[0])
