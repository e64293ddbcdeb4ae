# Audit trail: a checksummed manifest of every study result and an RO-Crate of the run.


rule audit:
    input:
        results=study_results(),
        inputs=expand("results/{dataset}/audit/inputs.sha256", dataset=DATASETS.index),
    output:
        manifest="results/study/audit/manifest.tsv",
        crate="results/ro-crate-metadata.json",
    log:
        "logs/audit/study.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(120),
    params:
        study=config["study"]["name"],
        sources=[p for d in DATASETS.index for p in dataset_inputs_of(d)],
        code=stage_code("audit"),
    script:
        "../scripts/audit.py"
