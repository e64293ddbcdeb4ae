# Raw stack (TIFF, PNG slices, MRC, zarr, HDF5, N5) -> single-level OME-Zarr of uint8 sections.
# The stack is checked by a job of its own first: Snakemake removes a job's earlier outputs when
# the job starts, so a damaged replacement of a stack is refused before the earlier image goes.


rule check_stack:
    input:
        stack=dataset_stack_input,
    output:
        check="results/{dataset}/ingest/stack_check.json",
    log:
        "logs/check_stack/{dataset}.log",
    conda:
        "../envs/tessera.yaml"
    # reads every section, as ingest does, where an earlier image of the dataset would be lost
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(60),
    params:
        format=dataset_format,
        internal_path=dataset_internal_path,
        spacing=dataset_spacing,
        missing_sections=config["ingest"]["missing_sections"],
        earlier_image=lambda wildcards: f"results/{wildcards.dataset}/ingest/raw.ome.zarr",
        # size and time: a replacement with an older time reruns the dataset too
        identity=dataset_stack_identity,
        code=script_code("check_stack"),
    script:
        "../scripts/check_stack.py"


rule ingest:
    input:
        stack=dataset_stack_input,
        check="results/{dataset}/ingest/stack_check.json",
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
