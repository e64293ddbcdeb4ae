# Whole-volume prediction: plan the blocks, predict them in a fixed number of shard jobs per
# dataset and target (grouped for cluster submission), stitch them into one OME-Zarr map.


rule shard_plan:
    input:
        image="results/{dataset}/pyramid/raw.ome.zarr",
        qc="results/{dataset}/qc/sections.tsv",
        models=cascade_models,
    output:
        plan="results/{dataset}/predicted/{target}/plan.json",
    log:
        "logs/shard_plan/{dataset}_{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(1000),
        runtime=scaled_by_attempt(10),
    params:
        downsample=target_downsample,
        block=config["predict"]["block"],
        shard_jobs=config["predict"]["shard_jobs"],
        max_halo=config["predict"]["max_halo"],
        dtype=config["predict"]["dtype"],
        output_sigma=target_output_sigma,
        output_smoothing_sections=target_output_sigma_z,
        code=script_code("shard_plan"),
    script:
        "../scripts/shard_plan.py"


rule predict_shard:
    input:
        plan="results/{dataset}/predicted/{target}/plan.json",
        image="results/{dataset}/pyramid/raw.ome.zarr",
        models=cascade_models,
    output:
        shard=directory("results/{dataset}/predicted/{target}/shards/job{job}"),
    log:
        "logs/predict_shard/{dataset}_{target}_job{job}.log",
    benchmark:
        "benchmarks/runs/predict_shard/{dataset}_{target}_job{job}.tsv"
    group:
        "predict_shards"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(4000),
        runtime=scaled_by_attempt(120),
    params:
        code=script_code("predict_shard"),
    script:
        "../scripts/predict_shard.py"


rule stitch:
    input:
        plan="results/{dataset}/predicted/{target}/plan.json",
        shards=shard_outputs,
    output:
        image=directory("results/{dataset}/predicted/{target}/probability.ome.zarr"),
    log:
        "logs/stitch/{dataset}_{target}.log",
    benchmark:
        "benchmarks/runs/stitch/{dataset}_{target}.tsv"
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(60),
    params:
        viewing_levels=config["predict"]["viewing_levels"],
        code=script_code("stitch"),
    script:
        "../scripts/stitch.py"
