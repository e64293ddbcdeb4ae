"""Snakemake adapter: SHA-256 of one dataset's input files."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.checksum_inputs import checksum_inputs_job
from tessera.workflow.runner import run_job

# the stack, and the ROI mask when the sheet names one (one path reads as a plain string)
paths = snakemake.input.paths
run_job(
    snakemake,
    checksum_inputs_job,
    paths=[paths] if isinstance(paths, str) else list(paths),
    out_path=snakemake.output[0],
)
