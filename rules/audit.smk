# Audit trail: a checksummed manifest of every study result, an index of every job's provenance
# record (results/provenance/, written by each job) and an RO-Crate of the run.


rule audit:
    input:
        results=study_results(),
        inputs=expand("results/{dataset}/audit/inputs.sha256", dataset=DATASETS.index),
    output:
        manifest=report(
            "results/study/audit/manifest.tsv",
            caption="../report/manifest.rst",
            category="Audit trail",
        ),
        records=report(
            "results/study/audit/provenance.tsv",
            caption="../report/provenance.rst",
            category="Audit trail",
        ),
        crate=report(
            "results/ro-crate-metadata.json",
            caption="../report/ro_crate.rst",
            category="Audit trail",
        ),
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
        code=script_code("audit"),
    script:
        "../scripts/audit.py"
