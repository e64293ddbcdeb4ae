# tessera: EM stacks -> OME-Zarr -> section QC -> pyramid -> tiles -> cascade -> sharded
# prediction -> stitched probability map -> labelled objects -> morphometry -> statistics.
# Read the pipeline off the include list: each stage has rules/<stage>.smk, each rule a thin
# scripts/<rule>.py that calls one job function in tessera/workflow/jobs/.

from snakemake.utils import min_version

min_version("9.0")


include: "rules/config_file.smk"


configfile: CONFIG_FILE


include: "rules/common.smk"
include: "rules/demo.smk"
include: "rules/ingest.smk"
include: "rules/pyramid.smk"
include: "rules/qc.smk"
include: "rules/tiles.smk"
include: "rules/train.smk"
include: "rules/ladder.smk"
include: "rules/evaluate.smk"
include: "rules/downsampling.smk"
include: "rules/predict.smk"
include: "rules/objects.smk"
include: "rules/next_tiles.smk"
include: "rules/morphometry.smk"
include: "rules/meshes.smk"
include: "rules/statistics.smk"
include: "rules/methods.smk"
include: "rules/audit.smk"


rule all:
    default_target: True
    input:
        study_results(),
        "results/study/audit/manifest.tsv",
