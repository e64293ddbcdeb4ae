# Annotation tiles: sampled per dataset from label volumes, then merged and split per target
# into training, validation and test tiles kept apart in z.


rule sample_tiles:
    input:
        labels=target_labels,
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
        exclude_flagged=config["qc"]["exclude_flagged"],
        code=stage_code("tiles"),
    script:
        "../scripts/sample_tiles.py"


rule split_tiles:
    input:
        tiles=expand("results/{dataset}/tiles/{{target}}", dataset=DATASETS.index),
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
        code=stage_code("tiles"),
    script:
        "../scripts/split_tiles.py"
