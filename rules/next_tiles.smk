# Where to annotate next: tile centres of highest model uncertainty, as a points sheet.


rule next_tiles:
    input:
        probabilities=expand(
            "results/{dataset}/predicted/{{target}}/probability.ome.zarr",
            dataset=DATASETS.index,
        ),
        qc=expand("results/{dataset}/qc/sections.tsv", dataset=DATASETS.index),
        tiles="results/study/{target}/tiles",
    output:
        points="results/study/{target}/next_tiles/points.tsv",
        preview=report(
            "results/study/{target}/next_tiles/preview.png",
            caption="../report/next_tiles.rst",
            category="Annotate next",
            labels={"target": "{target}"},
        ),
    log:
        "logs/next_tiles/{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(30),
    params:
        datasets=list(DATASETS.index),
        size=lambda wildcards: target_tiles(wildcards)["size"],
        suggest=lambda wildcards: target_settings(wildcards)["next_tiles"],
        held_out=lambda wildcards: target_settings(wildcards)["split"]["test_datasets"]
        or [],
        guard=target_guard_sections,
        code=script_code("next_tiles"),
    script:
        "../scripts/next_tiles.py"
