# Objects -> size and shape per object, densities per region (sheet ROI labels, e.g. cells).


rule check_roi:
    # a job of its own: a region mask damaged after a run stops here, and the dataset's earlier
    # morphometry tables stay (Snakemake clears a job's outputs when the job starts)
    input:
        roi=lambda wildcards: dataset_roi(wildcards)[0],
        image="results/{dataset}/ingest/raw.ome.zarr",
    output:
        check="results/{dataset}/roi_check/regions.json",
    log:
        "logs/check_roi/{dataset}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(30),
    params:
        # size and time: a replacement with an older time reruns the morphometry too
        identity=dataset_roi_identity,
        code=script_code("check_roi"),
    script:
        "../scripts/check_roi.py"


rule morphometry:
    input:
        image="results/{dataset}/objects/{target}.ome.zarr",
        table="results/{dataset}/objects/{target}.tsv",
        roi=dataset_roi,
        roi_check=dataset_roi_check,
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
