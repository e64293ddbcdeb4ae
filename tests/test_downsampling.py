"""Variants as targets of their own, and the downsampling recommendation."""

import pandas as pd
import pytest

from tessera.downsampling_study import recommend_factor
from tessera.errors import TesseraInputError
from tessera.workflow.config import expand_variants, load_config
from tessera.workflow.jobs.downsampling_study import downsampling_study_job


def base_config(**target):
    return {
        "datasets": "x.tsv",
        "targets": {
            "mito": {"downsample": 2, "annotations": {"labels": "{dataset}.tif"}, **target}
        },
    }


def test_variants_merge_one_level_deep_and_are_validated_like_targets(repo):
    schema = repo / "config" / "schemas" / "config.schema.yaml"
    config = load_config(
        base_config(
            variants={
                "s3": {"cascade": {"stages": 3}},
                "trees": {"cascade": {"classifier": "extra_trees"}},
            }
        ),
        schema,
    )
    base_of = expand_variants(config)
    config = load_config(config, schema)
    assert base_of == {"mito": "mito", "mito.s3": "mito", "mito.trees": "mito"}
    assert config["targets"]["mito.s3"]["cascade"]["stages"] == 3
    assert (
        config["targets"]["mito.s3"]["cascade"]["levels"]
        == config["targets"]["mito"]["cascade"]["levels"]
    )
    assert config["targets"]["mito.trees"]["cascade"]["classifier"] == "extra_trees"


def test_a_sweep_naming_an_unknown_parameter_is_refused(repo):
    schema = repo / "config" / "schemas" / "config.schema.yaml"
    with pytest.raises(
        TesseraInputError, match="key targets.mito.variants.s3: Additional properties"
    ):
        load_config(base_config(variants={"s3": {"stagez": 3}}), schema)
    config = load_config(base_config(variants={"s3": {"cascade": {"stagez": 3}}}), schema)
    expand_variants(config)
    with pytest.raises(
        TesseraInputError, match="key targets.mito.s3.cascade: Additional properties"
    ):
        load_config(config, schema)


def test_downsampling_study_scales_tiles_and_needs_label_volumes(repo):
    schema = repo / "config" / "schemas" / "config.schema.yaml"
    config = load_config(
        base_config(tiles={"size": 100}, downsampling_study={"factors": [1, 2, 8]}), schema
    )
    expand_variants(config)
    assert (
        config["targets"]["mito.x1"]["tiles"]["size"] == 200
        and config["targets"]["mito.x8"]["tiles"]["size"] == 25
    )
    assert config["targets"]["mito.x1"]["downsample"] == 1 and "mito.x2" not in config["targets"]
    painted = base_config(downsampling_study={"factors": [1, 2]})
    painted["targets"]["mito"]["annotations"] = {"painted": {"points": "p.tsv", "masks": "m"}}
    with pytest.raises(TesseraInputError, match="needs label volumes"):
        expand_variants(load_config(painted, schema))


def test_recommendation_is_the_cheapest_factor_within_tolerance(tmp_path):
    curve = pd.DataFrame({"factor": [1, 2, 4, 8], "f1": [0.90, 0.91, 0.895, 0.70]})
    assert recommend_factor(curve, tolerance=0.02) == 4
    assert recommend_factor(curve, tolerance=0.0) == 2
    summaries = []
    for f, f1 in zip([2, 4, 8], [0.95, 0.96, 0.95], strict=True):
        path = tmp_path / f"s{f}.tsv"
        pd.DataFrame(
            {
                "dataset": ["all"],
                "tiles": [6],
                "f1": [f1],
                "f1_ci_low": [f1 - 0.02],
                "f1_ci_high": [f1 + 0.01],
                "jaccard": [f1 / (2 - f1)],
                "object_f1": [0.9],
            }
        ).to_csv(path, sep="\t", index=False)
        summaries.append(path)
    out = downsampling_study_job(
        summaries,
        [2, 4, 8],
        tmp_path / "curve.tsv",
        tmp_path / "curve.png",
        target="nuclei",
        tolerance=0.02,
    )
    assert out["recommended"] == 8
    table = pd.read_csv(tmp_path / "curve.tsv", sep="\t")
    assert table["relative_cost"].tolist() == [0.25, 0.0625, 0.015625]
    assert table["recommended"].tolist() == [False, False, True]
