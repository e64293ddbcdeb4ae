# Audit trail: checksums of every input file, and a methods paragraph written from the run.


rule checksum_inputs:
    input:
        # after the stack's check: a damaged replacement stops there, before its checksum
        # would replace the record of the stack the results rest on
        checked="results/{dataset}/ingest/stack_check.json",
        paths=dataset_inputs,
    output:
        "results/{dataset}/audit/inputs.sha256",
    log:
        "logs/checksum_inputs/{dataset}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(500),
        runtime=scaled_by_attempt(120),
    params:
        # a stack or mask replaced by a file with an older time is hashed again
        identity=dataset_inputs_identity,
        code=script_code("checksum_inputs"),
    script:
        "../scripts/checksum_inputs.py"


rule methods:
    input:
        scores=expand(
            "results/study/{target}/tiles_predicted/scores.tsv",
            target=BASE_TARGETS,
        ),
        comparisons=expand(
            "results/study/{target}/statistics/comparison.tsv",
            target=BASE_TARGETS,
        ),
        objects=expand(
            "results/{dataset}/objects/{target}.json",
            target=BASE_TARGETS,
            dataset=DATASETS.index,
        ),
        checksums=expand(
            "results/{dataset}/audit/inputs.sha256", dataset=DATASETS.index
        ),
        qc=expand("results/{dataset}/qc/sections.tsv", dataset=DATASETS.index),
        # their attributes record how each stack's grey values were brought to 8 bits
        ingest=expand("results/{dataset}/ingest/raw.ome.zarr", dataset=DATASETS.index),
        ladder=expand(
            "results/study/{target}/ladder/choice.tsv", target=LADDER_BASE_TARGETS
        ),
        objects_3d=expand(
            "results/study/{target}/evaluation/objects_3d.tsv", target=LABELLED_TARGETS
        ),
        first_nodes=expand(
            "results/study/{target}/cascade/stage1_level0.npz", target=BASE_TARGETS
        ),
    output:
        report(
            "results/study/methods.md",
            caption="../report/methods.rst",
            category="Methods",
        ),
    log:
        "logs/methods/study.log",
    conda:
        "../envs/tessera.yaml"
    params:
        sections={
            **{k: config[k] for k in ("ingest", "pyramid", "qc", "statistics")},
            "targets": {t: target_without_variants(t) for t in BASE_TARGETS},
        },
        datasets=dataset_groups,
        targets=BASE_TARGETS,
        dataset_ids=list(DATASETS.index),
        ladder_targets=LADDER_BASE_TARGETS,
        objects_3d_targets=LABELLED_TARGETS,
        annotated={t: annotated_ids_of(t) for t in BASE_TARGETS},
        code=script_code("methods"),
    script:
        "../scripts/methods.py"
