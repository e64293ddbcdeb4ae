# Per-section quality control: sharpness, contrast, blank/torn areas, shifts -> flags.


rule section_qc:
    input:
        image="results/{dataset}/ingest/raw.ome.zarr",
    output:
        table="results/{dataset}/qc/sections.tsv",
        plot=report(
            "results/{dataset}/qc/sections.png",
            caption="../report/section_qc.rst",
            category="Section QC",
            labels={"dataset": "{dataset}"},
        ),
    log:
        "logs/section_qc/{dataset}.log",
    benchmark:
        "benchmarks/runs/section_qc/{dataset}.tsv"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(30),
    params:
        qc=config["qc"],
        code=script_code("section_qc"),
    script:
        "../scripts/section_qc.py"
