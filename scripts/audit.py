"""Snakemake adapter: manifest of every result and the run's RO-Crate."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parent))

from tessera.workflow.jobs.audit import audit_job
from tessera.workflow.runner import run_job

run_job(
    snakemake,
    audit_job,
    outputs=list(snakemake.input.results),
    inputs=snakemake.params.sources,
    out_manifest=snakemake.output.manifest,
    out_crate=snakemake.output.crate,
    out_records=snakemake.output.records,
    study_name=snakemake.params.study,
)
