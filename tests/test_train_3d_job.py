"""A 3D cascade left without ``voxel_aspect`` in the config takes it from the data.

The working level's voxel size is written by ingest from the sheet (z, y, x in nm); the job that
trains a node reads it and records z / in-plane in the model. The references are the voxel
sizes given here (arithmetic) and the refusal when two datasets disagree.
"""

import numpy as np
import pandas as pd
import pytest
import tifffile

from tessera.errors import TesseraInputError
from tessera.workflow.files.node_model import read_node
from tessera.workflow.files.tile_registry import write_annotation_set
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.predict import shard_plan_job
from tessera.workflow.jobs.pyramid import pyramid_job
from tessera.workflow.jobs.train import train_node_job

TILE = 24
CASCADE = {
    "levels": 0,
    "dims": 3,
    "voxel_aspect": None,
    "sigmas": [1.0],
    "classifier_options": {"hidden_layer_sizes": [4], "max_iter": 3},
    "samples_per_tile": 100,
    "folds": 2,
}


def _dataset(root, name, spacing, seed, downsample=1):
    rng = np.random.default_rng(seed)
    side = 2 * TILE * downsample  # two tiles of the working level in y
    volume = rng.integers(0, 256, (12, side, side), dtype=np.uint8)
    tifffile.imwrite(root / f"{name}.tif", volume)
    ingest_job(root / f"{name}.tif", root / f"{name}.ome.zarr", fmt="tiff_stack", spacing=spacing)
    pyramid_job(
        root / f"{name}.ome.zarr", root / f"{name}_pyr.ome.zarr", levels=1, downsample_z=False
    )
    return root / f"{name}_pyr.ome.zarr", volume


def _tiles(root, volumes):
    rows, labels = [], {}
    for name, volume in volumes.items():
        for k, y0 in enumerate((0, TILE)):
            tid = f"{name}_{k}"
            rows.append(
                {
                    "tile_id": tid,
                    "dataset": name,
                    "target": "blob",
                    "level": 0,
                    "z": 6,
                    "y0": y0,
                    "x0": 0,
                    "height": TILE,
                    "width": TILE,
                    "source": "labels",
                    "role": "train",
                }
            )
            labels[tid] = (volume[6, y0 : y0 + TILE, :TILE] > 127).astype(np.uint8)
    write_annotation_set(root / "tiles", pd.DataFrame(rows), labels)
    return root / "tiles"


def _train(root, pyramids, downsample=1, cascade=CASCADE):
    out = root / "stage1_level0.npz"
    train_node_job(
        _tiles(root, {name: vol for name, (_, vol) in pyramids.items()}),
        {name: path for name, (path, _) in pyramids.items()},
        [],
        out,
        target="blob",
        downsample=downsample,
        cascade=cascade,
        stage=1,
        level=0,
    )
    return out


@pytest.mark.parametrize(
    ("spacing", "downsample", "aspect"), [((20, 5, 5), 1, 4.0), ((10, 5, 5), 2, 1.0)]
)
def test_the_aspect_of_the_working_level_is_read_from_the_data(
    tmp_path, spacing, downsample, aspect
):
    # Arithmetic: z 20 nm over 5 nm pixels is 4; z 10 nm over 2 x 5 nm pixels (in-plane
    # reduction only) is 1.
    pyramids = {"a": _dataset(tmp_path, "a", spacing, 0, downsample)}
    model = read_node(_train(tmp_path, pyramids, downsample), target="blob")
    assert model.spec.dims == 3 and model.spec.voxel_aspect == pytest.approx(aspect)


def test_datasets_of_other_aspects_cannot_share_a_3d_model(tmp_path):
    pyramids = {
        "a": _dataset(tmp_path, "a", (10, 5, 5), 0),
        "b": _dataset(tmp_path, "b", (20, 5, 5), 1),
    }
    with pytest.raises(TesseraInputError) as refused:
        _train(tmp_path, pyramids)
    assert "datasets a and b have working-level voxel aspects (z / in-plane) " in str(refused.value)
    assert "; a 3D cascade needs one" in str(refused.value)


def test_a_3d_model_is_not_applied_to_data_of_another_aspect(tmp_path):
    # Trained at aspect 2 (10 nm sections, 5 nm pixels); a dataset of 20 nm sections has
    # aspect 4: its plan is refused, naming the file, and nothing is written.
    model = _train(tmp_path, {"a": _dataset(tmp_path, "a", (10, 5, 5), 0)})
    other, _ = _dataset(tmp_path, "b", (20, 5, 5), 1)
    plan = tmp_path / "plan.json"
    with pytest.raises(TesseraInputError) as refused:
        shard_plan_job(
            other,
            [model],
            plan,
            target="blob",
            downsample=1,
            block=(4, 512, 512),
            shard_jobs=1,
            max_halo=512,
            dtype="uint8",
        )
    message = "working-level voxel aspect (z / in-plane) 4, but the 3D model was trained at 2"
    assert message in str(refused.value) and str(other) in str(refused.value)
    assert not plan.exists()


@pytest.mark.parametrize(
    ("spacing", "downsample", "neighbours", "dims"),
    [
        ((5, 5, 5), 1, 0, 3),  # FIB-SEM: isotropic voxels
        ((10, 5, 5), 1, 0, 3),  # aspect 2, the edge of near-isotropic
        ((10, 4, 4), 1, 0, 2),  # aspect 2.5
        ((40, 8, 8), 1, 0, 2),  # SBEM at full resolution: aspect 5
        ((50, 4, 4), 2, 0, 2),  # serial-section TEM, in-plane reduced 2x: aspect 6.25
        ((20, 5, 5), 2, 0, 2),  # aspect 4 as acquired, 2 at the working level: still 2D
        ((5, 5, 5), 2, 0, 3),  # FIB-SEM in-plane reduced 2x: still 3D (working aspect 0.5)
        ((5, 5, 5), 1, 1, 2),  # neighbours asks for 2D channels of the sections around
    ],
)
def test_dims_auto_is_3d_for_near_isotropic_data_only(
    tmp_path, spacing, downsample, neighbours, dims
):
    # Common practice: FIB-SEM stacks (z spacing about the pixel size) are segmented in 3D,
    # serial-section TEM and SBEM (sections 3-10x thicker than the pixels) section by section;
    # the rule is z spacing at most 2x the in-plane spacing as acquired, so every working level
    # of a stack gets the same mode (arithmetic on the voxel sizes given here). A 3D model
    # records the aspect of its working level.
    pyramids = {"a": _dataset(tmp_path, "a", spacing, 0, downsample)}
    cascade = {**CASCADE, "dims": "auto", "neighbours": neighbours}
    model = read_node(_train(tmp_path, pyramids, downsample, cascade), target="blob")
    assert model.spec.dims == dims
    if dims == 3:
        expected = spacing[0] / (spacing[1] * downsample)
        assert model.spec.voxel_aspect == pytest.approx(expected)


@pytest.mark.parametrize(
    ("spacing", "dims_setting", "dims", "neighbours"),
    [
        ((50, 4, 4), "auto", 2, 1),  # serial-section TEM: 2D, reading the sections around
        ((5, 5, 5), "auto", 3, 0),  # FIB-SEM: 3D, whose filter bank reads the sections around
        ((5, 5, 5), 2, 2, 1),  # 2D chosen in the config: the sections around as channels
    ],
)
def test_neighbours_auto_follows_the_dims(tmp_path, spacing, dims_setting, dims, neighbours):
    # The default: an anisotropic stack read section by section gets the intensity of the
    # sections above and below (common practice for serial sections); a 3D model needs none.
    pyramids = {"a": _dataset(tmp_path, "a", spacing, 0)}
    cascade = {**CASCADE, "dims": dims_setting, "neighbours": "auto"}
    model = read_node(_train(tmp_path, pyramids, 1, cascade), target="blob")
    assert (model.spec.dims, model.spec.neighbours) == (dims, neighbours)


def test_datasets_of_other_pixel_sizes_in_one_model_are_named_in_the_log(tmp_path, caplog):
    # Filters and stencils count pixels: 8 nm and 5 nm pixels put every structure at scales
    # 1.6x apart (arithmetic). Trained anyway, with a warning naming both; equal pixels, none.
    cascade = {**CASCADE, "dims": 2}
    pyramids = {
        "a": _dataset(tmp_path, "a", (40, 8, 8), 0),
        "b": _dataset(tmp_path, "b", (40, 5, 5), 1),
    }
    with caplog.at_level("WARNING", logger="tessera.workflow.jobs.train"):
        _train(tmp_path, pyramids, cascade=cascade)
    assert "datasets b and a have working-level pixels of 5 and 8 nm" in caplog.text
    caplog.clear()
    same = tmp_path / "same"
    same.mkdir()
    pyramids = {"a": _dataset(same, "a", (40, 8, 8), 0), "b": _dataset(same, "b", (40, 8, 8), 1)}
    with caplog.at_level("WARNING", logger="tessera.workflow.jobs.train"):
        _train(same, pyramids, cascade=cascade)
    assert "working-level pixels" not in caplog.text
