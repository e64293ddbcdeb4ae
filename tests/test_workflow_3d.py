"""A tiny near-isotropic (FIB-SEM-like) study through Snakemake with the shipped defaults for such
data: `cascade.dims: auto` gives a 3D cascade, `pyramid.downsample_z: auto` an isotropic pyramid,
and every later step (prediction, objects, their 3D scores, morphometry) runs on it.

References: the renderer's own instance labels (the truth the data were drawn from) and the
definitions of pixel F1 and object F1 at IoU > 0.5; the voxel volume in µm³ is the product of
the spacings (geometry).
"""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile
import yaml
from scipy import ndimage

from tessera.io.omezarr import open_image

pytestmark = pytest.mark.workflow

REPO_ROOT = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent
NM = 10.0  # rendered voxel size, the same on every axis

SHEET = (
    "dataset\tcondition\tsubject\tpath\tformat\tvoxel_z_nm\tvoxel_y_nm\tvoxel_x_nm\n"
    f"f1\twarm\tf1\tdemo/data/f1/raw.tif\ttiff_stack\t{NM}\t{NM}\t{NM}\n"
    f"f2\tcold\tf2\tdemo/data/f2/raw.tif\ttiff_stack\t{NM}\t{NM}\t{NM}\n"
)


def config():
    # Every setting left out takes the schema's default, as for a user: in particular
    # cascade.dims and pyramid.downsample_z are `auto`.
    return {
        "study": {"name": "tiny near-isotropic study"},
        "datasets": "config/datasets.tsv",
        "demo": {"seed": 11, "shape": [48, 400, 400], "tile_size": 48},
        "ingest": {"chunks": [1, 200, 200]},
        "pyramid": {"levels": 2},
        "qc": {"shift_crop": 256},
        "targets": {
            "mitochondria": {
                "downsample": 2,
                "annotations": {
                    "labels": "demo/data/{dataset}/truth/mitochondria.tif",
                    "instances": "demo/data/{dataset}/truth/mitochondria_instances.tif",
                },
                "tiles": {"size": 48, "per_dataset": 8},
                # as the README advises for near-isotropic stacks: one stack held out whole
                "split": {"guard_sections": 1, "test_datasets": ["f2"]},
                "cascade": {
                    "stages": 2,
                    "levels": 1,
                    "folds": 2,
                    "samples_per_tile": 400,
                    "sigmas": [1.0, 2.0],
                    "coarse_sigmas": [1.0],
                    "stencil_radii": [1, 2, 4],
                },
                "objects": {"min_volume_um3": 0.002},
            }
        },
    }


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("study3d")
    (root / "config").mkdir()
    (root / "config" / "config.yaml").write_text(yaml.safe_dump(config()))
    (root / "config" / "datasets.tsv").write_text(SHEET)
    result = subprocess.run(
        [str(BIN / "snakemake"), "--cores", "2", "--snakefile", str(REPO_ROOT / "Snakefile")],
        cwd=root,
        capture_output=True,
        text=True,
        timeout=1200,
    )
    if result.returncode != 0:
        raise AssertionError(f"snakemake failed:\n{result.stdout}\n{result.stderr}")
    return root


def test_near_isotropic_data_get_an_isotropic_pyramid_and_a_3d_cascade(study):
    for dataset in ("f1", "f2"):
        _, info = open_image(study / f"results/{dataset}/pyramid/raw.ome.zarr")
        assert info["factors"] == [(1, 1, 1), (2, 2, 2), (4, 4, 4)]
        assert info["levels"][1].shape == (24, 200, 200)
    logs = sorted((study / "logs/train_node").glob("*.log"))
    assert len(logs) == 4  # 2 stages x (levels 0 and 1)
    for log in logs:
        done = [line for line in log.read_text().splitlines() if " done in " in line]
        assert json.loads(done[-1].split(": ", 1)[1])["dims"] == 3, log.name


def test_near_isotropic_study_segments_and_measures_in_3d(study):
    target = study / "results/study/mitochondria"
    summary = pd.read_csv(target / "evaluation/summary.tsv", sep="\t")
    pooled = summary[summary["dataset"] == "all"].iloc[0]
    assert pooled["f1"] >= 0.8  # pixel F1 on the held-out test tiles against the rendered truth
    scores = pd.read_csv(target / "evaluation/objects_3d.tsv", sep="\t")
    total = scores[scores["dataset"] == "all"].iloc[0]
    assert total["truth_objects"] >= 3
    assert total["object_f1"] >= 0.6  # whole mitochondria in 3D, IoU > 0.5, held-out sections
    # the finished objects' voxels against the rendered truth at full resolution (working voxels
    # repeated 2 x 2 x 2): Jaccard J = F1 / (2 - F1), so 0.6 is a pixel F1 of 0.75
    assert total["voxel_jaccard"] >= 0.6
    # f2 is held out whole: every one of its 48 sections is scored but those QC excluded; f1
    # gives training and validation tiles only
    rows = scores.set_index("dataset")
    assert rows.loc["f2", "sections"] + rows.loc["f2", "excluded_sections"] == 48
    assert (rows.loc["f2", "first_section"], rows.loc["f2", "last_section"]) == (0, 47)
    # so the whole true objects are those that no face of the volume cuts. Reference: the
    # bounding boxes of scipy.ndimage.find_objects on the rendered instances
    instances = tifffile.imread(study / "demo/data/f2/truth/mitochondria_instances.tif")
    boxes = [b for b in ndimage.find_objects(instances) if b is not None]
    inside = [
        b
        for b in boxes
        if all(0 < a.start and a.stop < n for a, n in zip(b, instances.shape, strict=True))
    ]
    assert rows.loc["f2", "truth_whole"] == len(inside) and len(inside) >= 1
    assert rows.loc["f1", "sections"] == 0 and rows.loc["f2", "prediction_factors"] == "2x2x2"
    tiles = pd.read_csv(target / "tiles/tiles.tsv", sep="\t")
    assert set(tiles.loc[tiles["dataset"] == "f2", "role"]) == {"test"}
    assert set(tiles.loc[tiles["dataset"] == "f1", "role"]) <= {"train", "validation", "guard"}
    # nothing of the held-out stack is proposed for annotation: merged into the points, such a
    # tile would join the test set as drawn
    suggested = pd.read_csv(target / "next_tiles/points.tsv", sep="\t")
    assert len(suggested) and set(suggested["dataset"]) == {"f1"}
    # and they are to be trained on, so none lies on a section of f1's validation tiles (the
    # guard here is 1 section; the sheet counts full-resolution sections, 2 per working one)
    assert set(suggested["role"]) == {"train"}
    validation = tiles.loc[(tiles["dataset"] == "f1") & (tiles["role"] == "validation"), "z"]
    assert len(validation) and not set(suggested["z"] // 2) & set(validation)
    methods = (study / "results/study/methods.md").read_text()
    assert "of dataset f2 were held out whole as the test set" in methods
    for dataset in ("f1", "f2"):
        objects = pd.read_csv(study / f"results/{dataset}/objects/mitochondria.tsv", sep="\t")
        measured = pd.read_csv(
            study / f"results/{dataset}/morphometry/mitochondria_objects.tsv", sep="\t"
        )
        assert list(measured["id"]) == list(objects["id"])
        # working voxels are 20 nm on every axis: volume = voxels x (0.02 um)^3
        np.testing.assert_allclose(
            objects["volume_um3"], objects["voxels"] * (2 * NM / 1e3) ** 3, rtol=1e-9
        )
        assert np.isfinite(measured["surface_um2"]).all() and (measured["surface_um2"] > 0).all()
