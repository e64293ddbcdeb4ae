# The synthetic demo study: renders the stacks, truth labels and painted tiles that the demo
# sheet points to (demo/data/<dataset>/). Without a `demo:` section in the config this rule is
# not defined, so it can never overwrite real data.

if "demo" in config:

    rule demo_dataset:
        output:
            raw="demo/data/{dataset}/raw.tif",
            cells="demo/data/{dataset}/cells.tif",
            truth="demo/data/{dataset}/truth.json",
            mitochondria="demo/data/{dataset}/truth/mitochondria.tif",
            mitochondria_instances="demo/data/{dataset}/truth/mitochondria_instances.tif",
            nuclei="demo/data/{dataset}/truth/nuclei.tif",
            points="demo/data/{dataset}/tiles/points.tsv",
        log:
            "logs/demo_dataset/{dataset}.log",
        conda:
            "../envs/tessera.yaml"
        params:
            condition=dataset_condition,
            subject=dataset_subject,
            spacing=dataset_spacing,
            condition_volume_scale=demo_volume_scale,
            animal_sd=config["demo"]["animal_sd"],
            study_seed=config["demo"]["seed"],
            shape=config["demo"]["shape"],
            tile_size=config["demo"]["tile_size"],
            code=script_code("demo_dataset"),
        script:
            "../scripts/demo_dataset.py"
