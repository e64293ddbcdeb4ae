# Audit trail: a checksummed manifest of every study result and an RO-Crate of the run.


def study_results():
    """Every final result of the study (what `rule all` asks for, besides the audit itself)."""
    return [
        *expand("results/{dataset}/qc/sections.tsv", dataset=DATASETS.index),
        *expand("results/{dataset}/pyramid/raw.ome.zarr", dataset=DATASETS.index),
        *expand(
            "results/study/{target}/evaluation/summary.tsv", target=config["targets"]
        ),
        *expand("results/study/{target}/downsampling/curve.tsv", target=STUDY_TARGETS),
        *expand(
            "results/study/{target}/statistics/comparison.tsv", target=BASE_TARGETS
        ),
        "results/study/methods.md",
        *expand("results/study/{target}/next_tiles/points.tsv", target=BASE_TARGETS),
        *expand(
            "results/{dataset}/meshes/{target}.png",
            dataset=DATASETS.index,
            target=BASE_TARGETS,
        ),
        *expand(
            "results/{dataset}/morphometry/{target}_objects.tsv",
            dataset=DATASETS.index,
            target=BASE_TARGETS,
        ),
        *expand(
            "results/{dataset}/objects/{target}.ome.zarr",
            dataset=DATASETS.index,
            target=BASE_TARGETS,
        ),
    ]


rule audit:
    input:
        results=study_results(),
        inputs=expand("results/{dataset}/audit/inputs.sha256", dataset=DATASETS.index),
    output:
        manifest="results/study/audit/manifest.tsv",
        crate="results/ro-crate-metadata.json",
    log:
        "logs/audit/study.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(120),
    params:
        study=config["study"]["name"],
        sources=[p for d in DATASETS.index for p in dataset_inputs_of(d)],
        code=stage_code("audit"),
    script:
        "../scripts/audit.py"
