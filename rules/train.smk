# The cascade: one job per (target, stage, level) node, each reading the models of the nodes it
# depends on; then the held-out tiles are predicted and scored. Nodes of the configured number of
# levels lie in cascade/, those of a ladder rung with more levels in cascade/levels<L>/.


rule train_node:
    input:
        tiles="results/study/{target}/tiles",
        images=annotated_pyramids,
        qc=annotated_qc_tables,
        upstream=upstream_models,
    output:
        model="results/study/{target}/{nodeset}/stage{stage}_level{level}.npz",
    log:
        "logs/train_node/{target}_{nodeset}_stage{stage}_level{level}.log",
    benchmark:
        "benchmarks/runs/train_node/{target}_{nodeset}_stage{stage}_level{level}.tsv"
    conda:
        "../envs/tessera.yaml"
    threads: 2
    resources:
        mem_mb=scaled_by_attempt(4000),
        runtime=scaled_by_attempt(120),
    params:
        cascade=node_cascade,
        train_datasets=lambda wildcards: target_settings(wildcards)["train_datasets"],
        downsample=target_downsample,
        datasets=annotated_ids,
        code=script_code("train_node"),
    script:
        "../scripts/train_node.py"


rule predict_tiles:
    input:
        tiles="results/study/{target}/tiles",
        images=annotated_pyramids,
        qc=annotated_qc_tables,
        models=cascade_models,
    output:
        probabilities="results/study/{target}/tiles_predicted/probabilities.npz",
        scores=report(
            "results/study/{target}/tiles_predicted/scores.tsv",
            caption="../report/tile_scores.rst",
            category="Accuracy",
            labels={"target": "{target}"},
        ),
    log:
        "logs/predict_tiles/{target}.log",
    benchmark:
        "benchmarks/runs/predict_tiles/{target}.tsv"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(4000),
        runtime=scaled_by_attempt(60),
    params:
        downsample=target_downsample,
        output_sigma=target_output_sigma,
        output_smoothing_sections=target_output_sigma_z,
        datasets=annotated_ids,
        code=script_code("predict_tiles"),
    script:
        "../scripts/predict_tiles.py"
