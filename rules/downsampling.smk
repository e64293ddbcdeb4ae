# The downsampling study: one target scored at several factors, the cheapest good one chosen.


rule downsampling_study:
    input:
        summaries=study_factors,
        pyramids=annotated_pyramids,
    output:
        curve="results/study/{target}/downsampling/curve.tsv",
        plot=report(
            "results/study/{target}/downsampling/curve.png",
            caption="../report/downsampling.rst",
            category="Downsampling",
            labels={"target": "{target}"},
        ),
    log:
        "logs/downsampling_study/{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(500),
        runtime=scaled_by_attempt(10),
    params:
        factors=lambda wildcards: config["targets"][wildcards.target][
            "downsampling_study"
        ]["factors"],
        tolerance=lambda wildcards: config["targets"][wildcards.target][
            "downsampling_study"
        ]["tolerance"],
        code=script_code("downsampling_study"),
    script:
        "../scripts/downsampling_study.py"
