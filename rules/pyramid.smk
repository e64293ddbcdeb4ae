# Single-level image -> multiscale OME-Zarr (2 x 2 block means per level).


rule pyramid:
    input:
        image="results/{dataset}/ingest/raw.ome.zarr",
    output:
        image=directory("results/{dataset}/pyramid/raw.ome.zarr"),
    log:
        "logs/pyramid/{dataset}.log",
    benchmark:
        "benchmarks/runs/pyramid/{dataset}.tsv"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(60),
    params:
        levels=config["pyramid"]["levels"],
        downsample_z=config["pyramid"]["downsample_z"],
        code=script_code("pyramid"),
    script:
        "../scripts/pyramid.py"
