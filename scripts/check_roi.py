"""Snakemake adapter: check one dataset's region mask whole, before its morphometry."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.morphometry import check_roi_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    check_roi_job,
    roi_path=snakemake.input.roi,
    image_path=snakemake.input.image,
    out_path=snakemake.output.check,
)
