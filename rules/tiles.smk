# Annotation tiles: sampled per dataset from label volumes, or cut around points for painting
# and read back once painted; then merged and split per target into training, validation and
# test tiles kept apart in z.


rule check_labels:
    # a job of its own: a label volume damaged after a run stops here, and the dataset's
    # earlier tiles stay (Snakemake clears a job's outputs when the job starts)
    input:
        labels=target_labels,
        instances=target_instances,
        image="results/{dataset}/ingest/raw.ome.zarr",
        pyramid="results/{dataset}/pyramid/raw.ome.zarr",
    output:
        check="results/{dataset}/labels_check/{target}.json",
    log:
        "logs/check_labels/{dataset}_{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(30),
    params:
        # size and time: a volume replaced by an older file reruns the dataset's tiles too
        identity=target_labels_identity,
        downsample=target_downsample,
        annotated_sections=target_annotated_sections,
        code=script_code("check_labels"),
    script:
        "../scripts/check_labels.py"


rule sample_tiles:
    input:
        labels=target_labels,
        check=target_labels_check,
        image="results/{dataset}/pyramid/raw.ome.zarr",
        qc="results/{dataset}/qc/sections.tsv",
    output:
        tiles=directory("results/{dataset}/tiles/{target}"),
    log:
        "logs/sample_tiles/{dataset}_{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(30),
    params:
        downsample=target_downsample,
        tiles=target_tiles,
        annotated_sections=target_annotated_sections,
        code=script_code("sample_tiles"),
    script:
        "../scripts/sample_tiles.py"


rule export_tiles:
    input:
        image="results/{dataset}/pyramid/raw.ome.zarr",
        points=target_points,
    output:
        tiles=directory("results/{dataset}/to_paint/{target}"),
    log:
        "logs/export_tiles/{dataset}_{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(10),
    params:
        downsample=target_downsample,
        size=target_tile_size,
        datasets=list(DATASETS.index),
        targets=list(config["targets"]),
        code=script_code("export_tiles"),
    script:
        "../scripts/export_tiles.py"


# Every painted mask of a target, of every dataset, is checked by a job of its own before any
# is imported: a mask painted wrongly after a run stops here, and the earlier tiles stay.


rule check_masks:
    input:
        exported=painted_exports,
        masks=target_painted_masks,
        images=annotated_pyramids,
        qc=annotated_qc_tables,
    output:
        check="results/study/{target}/masks_check.json",
    log:
        "logs/check_masks/{target}.log",
    wildcard_constraints:
        target=PAINTED_TARGETS_PATTERN,
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(10),
    params:
        datasets=annotated_ids,
        masks=painted_masks_folder,
        painted=painted_options,
        # the earlier imports' records, read before rule import_tiles replaces them: not an
        # input, since the first run has none
        painted_on=lambda wildcards: {
            d: f"results/{d}/tiles_painted/{wildcards.target}.painted_on.json"
            for d in annotated_ids(wildcards)
        },
        code=script_code("check_masks"),
    script:
        "../scripts/check_masks.py"


rule import_tiles:
    input:
        exported="results/{dataset}/to_paint/{target}",
        masks=painted_masks,
        check="results/study/{target}/masks_check.json",
    output:
        tiles=directory("results/{dataset}/tiles_painted/{target}"),
        painted_on="results/{dataset}/tiles_painted/{target}.painted_on.json",
    log:
        "logs/import_tiles/{dataset}_{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(10),
    params:
        masks=painted_masks_folder,
        painted=painted_options,
        code=script_code("import_tiles"),
    script:
        "../scripts/import_tiles.py"


rule split_tiles:
    input:
        tiles=annotation_sets,
    output:
        tiles=directory("results/study/{target}/tiles"),
    log:
        "logs/split_tiles/{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(10),
    params:
        split=target_split,
        train_tiles=points_to_train,
        code=script_code("split_tiles"),
    script:
        "../scripts/split_tiles.py"
