# Objects -> one decimated surface mesh file per dataset and target, plus a preview rendering.


rule meshes:
    input:
        image="results/{dataset}/objects/{target}.ome.zarr",
        table="results/{dataset}/objects/{target}.tsv",
    output:
        ply="results/{dataset}/meshes/{target}.ply",
        preview=report(
            "results/{dataset}/meshes/{target}.png",
            caption="../report/meshes.rst",
            category="Meshes",
            labels={"dataset": "{dataset}", "target": "{target}"},
        ),
    log:
        "logs/meshes/{dataset}_{target}.log",
    conda:
        "../envs/tessera.yaml"
    resources:
        mem_mb=scaled_by_attempt(2000),
        runtime=scaled_by_attempt(30),
    params:
        step=config["meshes"]["step"],
        unit=config["meshes"]["unit"],
        preview_objects=config["meshes"]["preview_objects"],
        code=script_code("meshes"),
    script:
        "../scripts/meshes.py"
