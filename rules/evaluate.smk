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


# The stitched objects scored in 3D on each dataset's held-out test sections, against the
# instance volume or the connected components of the label volume (targets with labels only).


rule evaluate_objects:
    input:
        tiles="results/study/{target}/tiles",
        objects=annotated_objects,
        images=annotated_pyramids,
        labels=annotated_label_volumes,
        instances=annotated_instances,
        qc=annotated_qc_tables,
    output:
        table=report(
            "results/study/{target}/evaluation/objects_3d.tsv",
            caption="../report/objects_3d_table.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "objects in 3D"},
        ),
        plot=report(
            "results/study/{target}/evaluation/objects_3d.png",
            caption="../report/objects_3d.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "objects in 3D, chart"},
        ),
        crops=report(
            "results/study/{target}/evaluation/objects_3d_crops.png",
            caption="../report/objects_3d_crops.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "objects in 3D, crops"},
        ),
    log:
        "logs/evaluate_objects/{target}.log",
    wildcard_constraints:
        target=LABELLED_TARGETS_PATTERN,
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(4000),
        runtime=scaled_by_attempt(30),
    params:
        datasets=annotated_ids,
        instance_datasets=annotated_instance_ids,
        guard_sections=target_guard_sections,
        annotated_sections=target_annotated_sections,
        code=script_code("evaluate_objects"),
    script:
        "../scripts/evaluate_objects.py"
