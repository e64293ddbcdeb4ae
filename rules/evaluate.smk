# Accuracy on the held-out test tiles: pixel scores with bootstrap intervals, PR curve, objects,
# partition errors, plots; one study-level table across targets.


rule evaluate:
    input:
        tiles="results/study/{target}/tiles",
        probabilities="results/study/{target}/tiles_predicted/probabilities.npz",
        images=annotated_pyramids,
    output:
        summary=report(
            "results/study/{target}/evaluation/summary.tsv",
            caption="../report/evaluation.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "summary"},
        ),
        tiles="results/study/{target}/evaluation/per_tile.tsv",
        curve="results/study/{target}/evaluation/pr_curve.tsv",
        curve_plot=report(
            "results/study/{target}/evaluation/pr_curve.png",
            caption="../report/pr_curve.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "PR curve"},
        ),
        tiles_plot=report(
            "results/study/{target}/evaluation/per_tile.png",
            caption="../report/per_tile.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "per tile"},
        ),
        overlays=report(
            "results/study/{target}/evaluation/overlays.png",
            caption="../report/overlays.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "overlays"},
        ),
    log:
        "logs/evaluate/{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(30),
    params:
        downsample=target_downsample,
        datasets=annotated_ids,
        code=script_code("evaluate"),
    script:
        "../scripts/evaluate.py"
