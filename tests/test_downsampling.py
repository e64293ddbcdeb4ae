"""Variants as targets of their own, and the downsampling recommendation."""

import numpy as np
import pandas as pd
import pytest
import tifffile

from tessera.downsampling_study import recommend_factor
from tessera.errors import TesseraInputError
from tessera.workflow.config import expand_variants, load_config
from tessera.workflow.jobs.downsampling_study import downsampling_study_job, effective_z_factors
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.pyramid import pyramid_job


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
    # a coarse level may hold fewer tiles of that physical size: the study takes what fits,
    # the target itself keeps the schema's default (stop and say so)
    assert config["targets"]["mito.x8"]["tiles"]["allow_fewer"] is True
    assert config["targets"]["mito"]["tiles"]["allow_fewer"] is False
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


def test_the_cost_of_a_factor_counts_z_where_the_pyramid_reduces_it(tmp_path):
    # Voxels predicted at factor f: 1/f^2 of the volume in plane; a near-isotropic pyramid
    # halves z at every level too, so 1/f^3 there (geometry of the block-averaged levels).
    # Two datasets of equal size, one of each kind: the mean of the two fractions.
    raw = np.zeros((8, 32, 32), np.uint8)
    pyramids = []
    for name, spacing, downsample_z in (("fib", (8, 8, 8), True), ("sbem", (40, 8, 8), False)):
        tifffile.imwrite(tmp_path / f"{name}.tif", raw)
        ingest_job(
            tmp_path / f"{name}.tif", tmp_path / f"{name}.zarr", fmt="tiff_stack", spacing=spacing
        )
        pyramid_job(
            tmp_path / f"{name}.zarr",
            tmp_path / f"{name}_p.zarr",
            levels=2,
            downsample_z=downsample_z,
        )
        pyramids.append(tmp_path / f"{name}_p.zarr")
    assert effective_z_factors(pyramids[:1], [1, 2, 4]) == [1, 2, 4]
    assert effective_z_factors(pyramids[1:], [1, 2, 4]) == [1, 1, 1]
    mixed = effective_z_factors(pyramids, [2, 4])
    np.testing.assert_allclose(
        [1 / (f * f * z) for f, z in zip([2, 4], mixed, strict=True)],
        [(1 / 8 + 1 / 4) / 2, (1 / 64 + 1 / 16) / 2],
    )
