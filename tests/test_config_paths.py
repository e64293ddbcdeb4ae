"""Paths the config names (label, instance and painted-annotation files): held to the allowed
data roots, and present for every dataset that needs them, each refusal naming its key."""

import os
import re

import pytest
import yaml

from tessera.errors import TesseraInputError
from tessera.workflow.config import load_config
from tessera.workflow.config_paths import (
    check_annotation_files,
    check_config_paths,
    config_paths,
    instance_volumes,
)


def _painted_config(points, masks):
    return {
        "datasets": "config/datasets.tsv",
        "data_roots": [],
        "targets": {"er": {"annotations": {"painted": {"points": points, "masks": masks}}}},
    }


@pytest.mark.parametrize(
    ("config", "key", "shown"),
    [
        (
            {
                "datasets": "config/datasets.tsv",
                "data_roots": [],
                "targets": {"mito": {"annotations": {"labels": "../mnt/em/{dataset}.tif"}}},
            },
            "targets.mito.annotations.labels",
            "../mnt/em/a1.tif",
        ),
        (
            {
                "datasets": "config/datasets.tsv",
                "data_roots": [],
                "targets": {"mito": {"annotations": {"labels": "truth/{dataset}/../../../x.tif"}}},
            },
            "targets.mito.annotations.labels",
            "truth/a1/../../../x.tif",
        ),
        (
            _painted_config("../mnt/em/points.tsv", "masks"),
            "targets.er.annotations.painted.points",
            "../mnt/em/points.tsv",
        ),
        (_painted_config("points.tsv", "/etc"), "targets.er.annotations.painted.masks", "/etc"),
    ],
)
def test_config_paths_outside_the_data_roots_are_refused(layout, config, key, shown):
    project, _ = layout
    expected = (
        rf"config/config\.yaml, key {re.escape(key)}: {re.escape(repr(shown))} resolves to "
        rf"'{re.escape(os.path.realpath(project / shown))}', outside the allowed data roots"
    )
    with pytest.raises(TesseraInputError, match=expected):
        check_config_paths(config, ["a1"], base_dir=project)


def test_a_labels_template_is_checked_for_every_dataset(layout):
    project, outside = layout
    (project / "truth").mkdir()
    (project / "truth" / "a2").symlink_to(outside, target_is_directory=True)  # one link out
    config = {
        "datasets": "config/datasets.tsv",
        "data_roots": [],
        "targets": {"mito": {"annotations": {"labels": "truth/{dataset}/labels.tif"}}},
    }
    check_config_paths(config, ["a1"], base_dir=project)
    with pytest.raises(
        TesseraInputError, match=r"'truth/a2/labels\.tif' resolves to .*mnt/em/labels\.tif'"
    ):
        check_config_paths(config, ["a1", "a2"], base_dir=project)
    config["data_roots"] = ["../mnt/em"]  # relative to the project folder
    check_config_paths(config, ["a1", "a2"], base_dir=project)


def test_a_label_volume_missing_for_an_annotated_dataset_is_named_with_its_key(tmp_path):
    # Before, Snakemake reported the missing input of rule sample_tiles, without the config key.
    (tmp_path / "truth").mkdir()
    (tmp_path / "truth" / "a1.tif").write_bytes(b"")
    config = {
        "targets": {
            "mito": {
                "annotations": {"labels": "truth/{dataset}.tif"},
                "annotated_datasets": None,
            }
        }
    }
    with pytest.raises(TesseraInputError) as info:
        check_annotation_files(config, ["a1", "a2"], base_dir=tmp_path)
    assert str(info.value) == (
        "config/config.yaml, key targets.mito.annotations.labels: 'truth/a2.tif' (dataset a2) "
        "not found; expected a multi-page TIFF for every dataset the target is annotated on (or "
        "name the others in targets.mito.annotated_datasets)"
    )
    (tmp_path / "truth" / "a2.tif").mkdir()
    with pytest.raises(TesseraInputError, match=r"'truth/a2.tif' \(dataset a2\) is a folder"):
        check_annotation_files(config, ["a1", "a2"], base_dir=tmp_path)
    # a dataset the target is not annotated on needs no volume
    config["targets"]["mito"]["annotated_datasets"] = ["a1"]
    check_annotation_files(config, ["a1", "a2"], base_dir=tmp_path)
    # nor do the volumes the demo rule renders
    config["targets"]["mito"]["annotated_datasets"] = None
    config["targets"]["mito"]["annotations"]["labels"] = "demo/data/{dataset}/truth.tif"
    check_annotation_files(config, ["a1", "a2"], base_dir=tmp_path, generated_dir="demo/data")


def test_an_instance_volume_may_miss_some_datasets_but_not_all(tmp_path):
    (tmp_path / "labels").mkdir()
    for dataset in ("a1", "a2", "a3"):
        (tmp_path / "labels" / f"{dataset}.tif").write_bytes(b"")
    annotations = {"labels": "labels/{dataset}.tif", "instances": "{dataset}_instances.tif"}
    config = {"targets": {"mito": {"annotations": annotations, "annotated_datasets": None}}}
    with pytest.raises(TesseraInputError) as info:
        check_annotation_files(config, ["a1", "a2", "a3"], base_dir=tmp_path)
    assert str(info.value) == (
        "config/config.yaml, key targets.mito.annotations.instances: '{dataset}_instances.tif' "
        "names no file for any dataset the target is annotated on ('a1_instances.tif', dataset "
        "a1, not found); expected a multi-page TIFF for one dataset at least (those without one "
        "are scored against the 26-connected components of their labels)"
    )
    # one present: the others fall back to their labels, and are not listed as inputs
    (tmp_path / "a2_instances.tif").write_bytes(b"")
    check_annotation_files(config, ["a1", "a2", "a3"], base_dir=tmp_path)
    found = instance_volumes(annotations["instances"], ["a1", "a2", "a3"], base_dir=tmp_path)
    assert found == {"a2": "a2_instances.tif"}
    # a dataset outside annotated_datasets does not count as the one present
    config["targets"]["mito"]["annotated_datasets"] = ["a1", "a3"]
    with pytest.raises(TesseraInputError, match="names no file for any dataset"):
        check_annotation_files(config, ["a1", "a2", "a3"], base_dir=tmp_path)
    # a folder is refused even when another dataset has its file
    config["targets"]["mito"]["annotated_datasets"] = None
    (tmp_path / "a3_instances.tif").mkdir()
    with pytest.raises(
        TesseraInputError,
        match=r"key targets.mito.annotations.instances: 'a3_instances.tif' \(dataset a3\) is a "
        r"folder; expected a multi-page TIFF of instances",
    ):
        check_annotation_files(config, ["a1", "a2", "a3"], base_dir=tmp_path)
    # the volumes the demo rule renders count as present
    demo = {"labels": "labels/{dataset}.tif", "instances": "demo/data/{dataset}/ids.tif"}
    assert instance_volumes(
        demo["instances"], ["a1"], base_dir=tmp_path, generated_dir="demo/data"
    ) == {"a1": "demo/data/a1/ids.tif"}
    config["targets"]["mito"]["annotations"] = demo
    check_annotation_files(config, ["a1"], base_dir=tmp_path, generated_dir="demo/data")


def test_shipped_config_paths_lie_inside_the_project(repo, schemas, shipped_config):
    config = load_config(shipped_config, schemas / "config.schema.yaml")
    ids = ["tn1", "cd1"]
    # one path per dataset for each label or instance template the shipped config names
    templates = sum(
        key in target["annotations"]
        for target in config["targets"].values()
        for key in ("labels", "instances")
    )
    assert len(config_paths(config, ids)) == len(ids) * templates
    check_config_paths(config, ids, base_dir=repo)


def test_every_path_key_of_the_config_schema_is_held_to_the_data_roots(schemas):
    # Every string setting of the schema is either a path that is checked against the roots or
    # named here as something else, so a new path key cannot slip past the check unnoticed.
    not_paths = {
        "study.name",
        "statistics.reference_condition",
        "data_roots[]",  # the roots themselves
        "targets.*.annotated_datasets[]",  # dataset ids
        "targets.*.train_datasets[]",
        "targets.*.split.test_datasets[]",
    }

    def strings(node, where):
        if isinstance(node, dict):
            if node.get("type") in ("string", ["string", "null"]):
                yield where
            for key, sub in (node.get("properties") or {}).items():
                yield from strings(sub, f"{where}.{key}" if where else key)
            extra = node.get("additionalProperties")
            if isinstance(extra, dict) and extra.get("type") == "object":
                yield from strings(extra, f"{where}.*")
            if isinstance(node.get("items"), dict):
                yield from strings(node["items"], f"{where}[]")

    schema = yaml.safe_load((schemas / "config.schema.yaml").read_text())
    paths = set(strings(schema, "")) - not_paths
    config = {
        "targets": {
            "a": {"annotations": {"labels": "{dataset}.tif", "instances": "{dataset}_ids.tif"}},
            "b": {"annotations": {"painted": {"points": "p.tsv", "masks": "m"}}},
        }
    }
    checked = {"datasets"} | {
        re.sub(r"^targets\.[ab]\.", "targets.*.", key) for key, _ in config_paths(config, ["d"])
    }
    assert paths == checked, sorted(paths ^ checked)
