# Study statistics per target: per-animal summaries, each condition against the reference.


rule statistics:
    input:
        objects=expand(
            "results/{dataset}/morphometry/{{target}}_objects.tsv",
            dataset=DATASETS.index,
        ),
        regions=expand(
            "results/{dataset}/morphometry/{{target}}_regions.tsv",
            dataset=DATASETS.index,
        ),
        scores="results/study/{target}/tiles_predicted/scores.tsv",
    output:
        animals="results/study/{target}/statistics/animals.tsv",
        conditions=report(
            "results/study/{target}/statistics/conditions.tsv",
            caption="../report/condition_summary.rst",
            category="Statistics",
            labels={"target": "{target}", "item": "conditions"},
        ),
        comparison=report(
            "results/study/{target}/statistics/comparison.tsv",
            caption="../report/comparison.rst",
            category="Statistics",
            labels={"target": "{target}", "item": "table"},
        ),
        plot=report(
            "results/study/{target}/statistics/conditions.png",
            caption="../report/conditions.rst",
            category="Statistics",
            labels={"target": "{target}", "item": "plot"},
        ),
    log:
        "logs/statistics/{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(30),
    params:
        datasets=dataset_groups,
        statistics=config["statistics"],
        code=script_code("statistics"),
    script:
        "../scripts/statistics.py"
