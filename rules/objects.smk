# Probability map -> hysteresis, morphology, holes, size filter -> globally labelled objects.


rule objects:
    input:
        probability="results/{dataset}/predicted/{target}/probability.ome.zarr",
        qc="results/{dataset}/qc/sections.tsv",
        scores="results/study/{target}/tiles_predicted/scores.tsv",
    output:
        image=directory("results/{dataset}/objects/{target}.ome.zarr"),
        table="results/{dataset}/objects/{target}.tsv",
        settings="results/{dataset}/objects/{target}.json",
    log:
        "logs/objects/{dataset}_{target}.log",
    benchmark:
        "benchmarks/runs/objects/{dataset}_{target}.tsv"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(4000),
        runtime=scaled_by_attempt(60),
    params:
        settings=target_objects,
        code=script_code("objects"),
    script:
        "../scripts/objects.py"
