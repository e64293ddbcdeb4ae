# The cascade ladder (targets.<t>.cascade.mode: ladder): every rung (stages x levels) is scored
# on the validation tiles; the choice table names the rung the predict rules use.


rule score_rung:
    input:
        tiles="results/study/{target}/tiles",
        images=annotated_pyramids,
        qc=annotated_qc_tables,
        models=rung_models,
    output:
        score="results/study/{target}/ladder/rung_{stages}x{levels}.tsv",
    log:
        "logs/score_rung/{target}_{stages}x{levels}.log",
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
        code=script_code("score_rung"),
    script:
        "../scripts/score_rung.py"


checkpoint choose_rung:
    input:
        scores=rung_scores,
    output:
        choice="results/study/{target}/ladder/choice.tsv",
        plot=report(
            "results/study/{target}/ladder/curve.png",
            caption="../report/ladder.rst",
            category="Accuracy",
            labels={"target": "{target}", "item": "cascade ladder"},
        ),
    log:
        "logs/choose_rung/{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(500),
        runtime=scaled_by_attempt(10),
    params:
        code=script_code("choose_rung"),
    script:
        "../scripts/choose_rung.py"
