"""Snakemake adapter: register the painted masks of one dataset's exported tiles."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.import_tiles import import_tiles_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    import_tiles_job,
    exported_dir=snakemake.input.exported,
    masks_dir=snakemake.params.masks,
    out_dir=snakemake.output.tiles,
    check=snakemake.input.check,
    out_painted_on=snakemake.output.painted_on,
    **snakemake.params.painted,
)
