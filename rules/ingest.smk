# Raw stack (TIFF, PNG slices, MRC, zarr, HDF5, N5) -> single-level OME-Zarr of uint8 sections.


rule ingest:
    input:
        stack=dataset_path,
    output:
        image=directory("results/{dataset}/ingest/raw.ome.zarr"),
    log:
        "logs/ingest/{dataset}.log",
    benchmark:
        "benchmarks/runs/ingest/{dataset}.tsv"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(60),
    params:
        format=dataset_format,
        internal_path=dataset_internal_path,
        spacing=dataset_spacing,
        chunks=config["ingest"]["chunks"],
        percentiles=config["ingest"]["percentiles"],
        missing_sections=config["ingest"]["missing_sections"],
        missing_chunks=config["ingest"]["missing_chunks"],
        code=script_code("ingest"),
    script:
        "../scripts/ingest.py"
