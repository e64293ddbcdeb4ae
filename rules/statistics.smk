# Study statistics per target: per-animal summaries, each condition against the reference.


rule check_distinct_stacks:
    # a job of its own: a stack listed twice (a copy under another dataset and animal) stops
    # here, and the statistics of the run before stay (Snakemake clears a job's outputs when
    # the job starts)
    input:
        checksums=expand(
            "results/{dataset}/audit/inputs.sha256", dataset=DATASETS.index
        ),
    output:
        check="results/study/distinct_stacks.json",
    log:
        "logs/check_distinct_stacks/study.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(500),
        runtime=scaled_by_attempt(10),
    params:
        stacks=dataset_stacks,
        sheet=config["datasets"],
        code=script_code("check_distinct_stacks"),
    script:
        "../scripts/check_distinct_stacks.py"


rule statistics:
    input:
        unpack(target_objects_3d),
        objects=expand(
            "results/{dataset}/morphometry/{{target}}_objects.tsv",
            dataset=DATASETS.index,
        ),
        regions=expand(
            "results/{dataset}/morphometry/{{target}}_regions.tsv",
            dataset=DATASETS.index,
        ),
        scores="results/study/{target}/tiles_predicted/scores.tsv",
        stacks_check="results/study/distinct_stacks.json",
    output:
        animals="results/study/{target}/statistics/animals.tsv",
        conditions=report(
            "results/study/{target}/statistics/conditions.tsv",
            caption="../report/condition_summary.rst",
            category="Conditions compared",
            labels={"target": "{target}", "item": "conditions"},
        ),
        comparison=report(
            "results/study/{target}/statistics/comparison.tsv",
            caption="../report/comparison.rst",
            category="Conditions compared",
            labels={"target": "{target}", "item": "table"},
        ),
        plot=report(
            "results/study/{target}/statistics/conditions.png",
            caption="../report/conditions.rst",
            category="Conditions compared",
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
