# tessera: EM stacks -> OME-Zarr -> section QC -> pyramid -> tiles -> cascade -> sharded
# prediction -> stitched probability map -> labelled objects -> morphometry -> statistics.
# Read the pipeline off the include list; each stage has rules/<stage>.smk,
# scripts/<stage>.py and tessera/<stage>.py.

from snakemake.utils import min_version

min_version("9.0")


configfile: "config/config.yaml"


include: "rules/common.smk"
include: "rules/demo.smk"
include: "rules/ingest.smk"
include: "rules/pyramid.smk"
include: "rules/qc.smk"
include: "rules/tiles.smk"
include: "rules/train.smk"
include: "rules/evaluate.smk"
include: "rules/downsampling.smk"
include: "rules/predict.smk"
include: "rules/objects.smk"
include: "rules/next_tiles.smk"
include: "rules/morphometry.smk"
include: "rules/meshes.smk"
include: "rules/statistics.smk"
include: "rules/methods.smk"


rule all:
    default_target: True
    input:
        expand(
            "results/{dataset}/qc/sections.tsv",
            dataset=DATASETS.index,
        ),
        expand(
            "results/{dataset}/pyramid/raw.ome.zarr",
            dataset=DATASETS.index,
        ),
        # every target and variant is scored on its test tiles
        expand(
            "results/study/{target}/evaluation/summary.tsv",
            target=config["targets"],
        ),
        expand(
            "results/study/{target}/downsampling/curve.tsv",
            target=STUDY_TARGETS,
        ),
        # whole volumes, objects and statistics for the targets themselves
        expand(
            "results/study/{target}/statistics/comparison.tsv",
            target=BASE_TARGETS,
        ),
        "results/study/methods.md",
        expand(
            "results/study/{target}/next_tiles/points.tsv",
            target=BASE_TARGETS,
        ),
        expand(
            "results/{dataset}/meshes/{target}.png",
            dataset=DATASETS.index,
            target=BASE_TARGETS,
        ),
