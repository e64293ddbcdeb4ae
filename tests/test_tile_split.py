"""The split of annotation tiles into training, validation and test tiles kept apart in z, and
the halo a tile is read with."""

import numpy as np
import pandas as pd
import pytest

from tessera.errors import TesseraInputError
from tessera.tiles.registry import ROLES, tile_slices
from tessera.tiles.split import split_tiles
from tessera.workflow.files.tile_registry import read_registry, write_annotation_set, write_split
from tessera.workflow.jobs.split_tiles import split_tiles_job

# --------------------------------------------------------------------------------------------
# split


def registry_for_split(seed=0):
    rng = np.random.default_rng(seed)
    rows = []
    for dataset in ("d1", "d2"):
        for target in ("mito", "nuclei"):
            zs = rng.integers(0, 40, 30)
            for i, z in enumerate(zs):
                rows.append(
                    {
                        "tile_id": f"{dataset}-{target}-{i}",
                        "dataset": dataset,
                        "target": target,
                        "level": 1,
                        "z": int(z),
                        "y0": 0,
                        "x0": 0,
                        "height": 8,
                        "width": 8,
                        "source": "labels",
                    }
                )
    return pd.DataFrame(rows)


@pytest.mark.parametrize("guard", [1, 2, 5])
def test_split_guard_distance_holds_for_all_pairs(guard):
    # Held-out tiles must be spatially separate from training tiles (common practice).
    reg = registry_for_split()
    out = split_tiles(reg, guard_sections=guard, seed=3)
    assert out["tile_id"].tolist() == reg["tile_id"].tolist()
    assert set(out["role"]) <= set(ROLES) and out["role"].notna().all()
    for (_, _), g in out.groupby(["dataset", "target"]):
        train = g.loc[g["role"] == "train", "z"].to_numpy()
        held = g.loc[g["role"].isin(["validation", "test"]), "z"].to_numpy()
        assert len(train) and len(held)
        assert np.abs(held[:, None] - train[None, :]).min() >= guard
        for role in ("train", "validation", "test"):  # a section never shared between roles
            others = g.loc[g["role"] != role, "z"]
            assert not set(g.loc[g["role"] == role, "z"]) & set(others)
        share = (g["role"] == "train").mean()
        assert abs(share - 0.6) <= 0.25


def test_split_is_deterministic_and_written_atomically(tmp_path):
    reg = registry_for_split()
    a = split_tiles(reg, seed=7)
    pd.testing.assert_frame_equal(a, split_tiles(reg, seed=7))
    write_split(tmp_path / "split.tsv", a)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["split.tsv"]
    pd.testing.assert_frame_equal(read_registry(tmp_path / "split.tsv"), a)
    with pytest.raises(TesseraInputError, match="role"):
        write_split(tmp_path / "nosplit.tsv", reg)
    with pytest.raises(TesseraInputError, match="fractions"):
        split_tiles(reg, fractions=(0.5, 0.2, 0.2))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["split.tsv"]


def test_a_dataset_held_out_whole_is_the_whole_test_set():
    # A test set that shares no specimen with training is the independent check (common
    # practice): every tile of d2 is a test tile, d1 gives training and validation tiles only,
    # in the 3 : 1 ratio of the fractions 0.6 and 0.2, and the guard still holds within d1.
    reg = registry_for_split()
    out = split_tiles(reg, guard_sections=2, seed=3, test_datasets=["d2"])
    assert set(out.loc[out["dataset"] == "d2", "role"]) == {"test"}
    for _, g in out[out["dataset"] == "d1"].groupby("target"):
        assert set(g["role"]) <= {"train", "validation", "guard"}
        train = g.loc[g["role"] == "train", "z"].to_numpy()
        held = g.loc[g["role"] == "validation", "z"].to_numpy()
        assert np.abs(held[:, None] - train[None, :]).min() >= 2
        kept = g[g["role"] != "guard"]
        assert abs((kept["role"] == "train").mean() - 0.75) <= 0.1
    with pytest.raises(TesseraInputError, match="test_datasets"):
        split_tiles(reg, fractions=(0.0, 0.0, 1.0), test_datasets=["d2"])


def test_tiles_painted_to_be_trained_on_change_no_other_role():
    # Tiles painted where the model was unsure are added to learn from: the test set as drawn
    # must stay as it was (common practice: never tune the test set to the model's mistakes),
    # so the other tiles keep their roles, and an added tile is trained on, or dropped as guard
    # where it lies nearer than the guard distance to a held-out tile.
    reg = registry_for_split()
    before = split_tiles(reg, guard_sections=2, seed=3)
    rows = []
    for (dataset, target), g in before.groupby(["dataset", "target"]):
        held = g.loc[g["role"].isin(["validation", "test"]), "z"].to_numpy()
        trained = g.loc[g["role"] == "train", "z"].to_numpy()
        far = trained[np.argmax([np.abs(held - z).min() for z in trained])]  # in the train range
        near = g.loc[g["role"] == "test", "z"].iloc[0]  # on a test tile's section
        for k, z in enumerate((near, far)):
            tile = {**g.iloc[0].drop("role").to_dict(), "tile_id": f"new-{dataset}-{target}-{k}"}
            rows.append({**tile, "z": int(z)})
    extra = pd.DataFrame(rows)
    added = pd.concat([reg, extra], ignore_index=True)
    after = split_tiles(added, guard_sections=2, seed=3, train_tiles=extra["tile_id"])
    pd.testing.assert_series_equal(after["role"].iloc[: len(reg)], before["role"])
    new = after.iloc[len(reg) :].set_index("tile_id")["role"]
    assert set(new[new.index.str.endswith("-0")]) == {"guard"}  # on a test tile's section
    for tile_id, role in new[new.index.str.endswith("-1")].items():
        row = after[after["tile_id"] == tile_id].iloc[0]
        g = after[(after["dataset"] == row["dataset"]) & (after["target"] == row["target"])]
        held = g.loc[g["role"].isin(["validation", "test"]), "z"].to_numpy()
        assert role == ("train" if np.abs(held - row["z"]).min() >= 2 else "guard")
    assert "train" in set(new)


def test_split_without_guard_drops_nothing():
    out = split_tiles(registry_for_split(), guard_sections=0)
    assert "guard" not in set(out["role"])


# --------------------------------------------------------------------------------------------
# halo


@pytest.mark.parametrize("y0, x0, halo", [(0, 0, 5), (10, 30, 4), (34, 1, 7), (12, 12, 0)])
def test_tile_slices_reflect_pad_matches_numpy_pad_of_section(y0, x0, halo):
    # Reference: numpy.pad(mode="reflect") of the whole section, then the tile plus halo.
    section = np.random.default_rng(1).integers(0, 255, (3, 48, 40)).astype(np.uint8)
    row = {"z": 1, "y0": y0, "x0": x0, "height": 14, "width": 9}
    index, pad = tile_slices(row, halo=halo, shape=section.shape)
    got = np.pad(section[index], pad, mode="reflect")
    ref = np.pad(section[1], halo, mode="reflect")[y0 : y0 + 14 + 2 * halo, x0 : x0 + 9 + 2 * halo]
    np.testing.assert_array_equal(got, ref)
    with pytest.raises(TesseraInputError, match="outside"):
        tile_slices({**row, "y0": 40}, halo=halo, shape=section.shape)


def test_a_split_that_leaves_a_role_without_tiles_is_refused_before_training(tmp_path):
    # Four tiles on sections 0-3 and held-out tiles 5 sections from training: no section can be
    # held out, so no threshold could be chosen and nothing scored. The split job says so with
    # the settings to change, and writes nothing (no model is trained on it).
    registry = pd.DataFrame(
        {
            "tile_id": [f"d-m-s{z:03d}" for z in range(4)],
            "dataset": "d",
            "target": "m",
            "level": 0,
            "z": range(4),
            "y0": 0,
            "x0": 0,
            "height": 4,
            "width": 4,
            "source": "labels",
        }
    )
    labels = {t: np.eye(4, dtype=np.uint8) for t in registry["tile_id"]}
    write_annotation_set(tmp_path / "d", registry, labels)
    out = tmp_path / "split"
    with pytest.raises(TesseraInputError) as info:
        split_tiles_job([tmp_path / "d"], out, fractions=[0.6, 0.2, 0.2], guard_sections=5, seed=0)
    assert str(info.value) == (
        f"{out}: the split leaves no validation and no test tiles (4 tiles on 4 sections; "
        "held-out tiles lie at least split.guard_sections = 5 sections from training); annotate "
        "tiles on more sections, lower split.guard_sections, or change split.fractions"
    )
    assert not out.exists()
