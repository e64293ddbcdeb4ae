# Objects -> size and shape per object, densities per region (sheet ROI labels, e.g. cells).


rule morphometry:
    input:
        image="results/{dataset}/objects/{target}.ome.zarr",
        table="results/{dataset}/objects/{target}.tsv",
        roi=dataset_roi,
        # the stack's full-resolution shape, which a region mask must have
        raw="results/{dataset}/pyramid/raw.ome.zarr",
    output:
        objects="results/{dataset}/morphometry/{target}_objects.tsv",
        regions="results/{dataset}/morphometry/{target}_regions.tsv",
    log:
        "logs/morphometry/{dataset}_{target}.log",
    benchmark:
        "benchmarks/runs/morphometry/{dataset}_{target}.tsv"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(60),
    params:
        code=script_code("morphometry"),
    script:
        "../scripts/morphometry.py"
