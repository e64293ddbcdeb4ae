"""Rule evaluate_objects' job on a small scene worked by hand: held-out sections only, QC
exclusions, predicted labels repeated onto the truth's grid, instances or connected components."""

import copy

import numpy as np
import pandas as pd
import pytest
import tifffile
import yaml
import zarr
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.omezarr import AXES, multiscale_attrs
from tessera.io.store_checksums import record_checksums
from tessera.methods import methods_text
from tessera.tiles.split import held_out_sections, split_tiles
from tessera.workflow.config import load_config
from tessera.workflow.files.objects_3d import overall_objects_3d, read_objects_3d
from tessera.workflow.jobs.evaluate_objects import evaluate_objects_job
from tessera.workflow.jobs.objects import objects_job

SHAPE = (10, 32, 32)  # full resolution; objects are made at (1, 2, 2)
SPACING = (40.0, 8.0, 8.0)

# The scene (z ranges inclusive, y and x half-open, full resolution), every box on the 2 x 2 grid:
#   A  z 8-9  y 2:10  x 2:10    predicted exactly
#   B  z 8-9  y 14:22 x 14:24   predicted as two boxes x 14:18 and x 20:24 (IoU 0.4 each)
#   C  z 0-3  y 2:10  x 20:28   truth only, in the training sections
#   D  z 5-6  y 24:30 x 24:30   prediction only, in the validation sections
#   E  z 6-9  y 24:30 x 2:8     predicted exactly
#   F  z 9    y 24:30 x 14:20   truth only, on section 9, which QC excludes
# Tiles: train z 0-3, guard z 4, validation z 5-6, test z 8 and 9 (guard_sections 2), so the
# held-out sections are 8 and 9, and 8 alone once QC excludes 9.
TRUTH = {
    "A": (8, 10, 2, 10, 2, 10),
    "B": (8, 10, 14, 22, 14, 24),
    "C": (0, 4, 2, 10, 20, 28),
    "E": (6, 10, 24, 30, 2, 8),
    "F": (9, 10, 24, 30, 14, 20),
}
PREDICTED = [
    (8, 10, 2, 10, 2, 10),
    (8, 10, 14, 22, 14, 18),
    (8, 10, 14, 22, 20, 24),
    (5, 7, 24, 30, 24, 30),
    (6, 10, 24, 30, 2, 8),
]


def _boxes(boxes, shape=SHAPE):
    volume = np.zeros(shape, np.uint16)
    for k, (z0, z1, y0, y1, x0, x1) in enumerate(boxes, start=1):
        volume[z0:z1, y0:y1, x0:x1] = k
    return volume


def _store(path, levels, extra=None):
    group = zarr.open_group(store=str(path), mode="w", zarr_format=3)
    group.attrs.update(
        {
            "ome": multiscale_attrs(
                name=path.stem, spacing=SPACING, factors=[f for f, _ in levels]
            ),
            **({"tessera": extra} if extra else {}),
        }
    )
    for k, (_, data) in enumerate(levels):
        group.create_array(name=str(k), data=data, chunks=(1, 16, 16), dimension_names=AXES)
    record_checksums(path)


def _scene(tmp_path, *, qc_excludes_9=True, qc_excludes_8_9=False):
    """Write every input of the job for dataset d1; return the job's input mapping."""
    rng = np.random.default_rng(0)
    raw = rng.integers(0, 255, SHAPE, dtype=np.uint8)
    _store(tmp_path / "raw.ome.zarr", [((1, 1, 1), raw), ((1, 2, 2), raw[:, ::2, ::2])])
    working = _boxes(PREDICTED)[:, ::2, ::2] > 0
    prob = tmp_path / "probability.ome.zarr"
    prob_levels = [((1, 1, 1), working.astype(np.uint8) * 255)]
    _store(
        prob,
        prob_levels,
        {"probability": {"scale": 255.0, "z_factor": 1, "working_level_downsample": 2}},
    )
    # the probability image's spacing is the working level's
    group = zarr.open_group(store=str(prob), mode="r+")
    group.attrs["ome"] = multiscale_attrs(name="p", spacing=(40.0, 16.0, 16.0), factors=[(1, 1, 1)])
    record_checksums(prob)
    qc = tmp_path / "sections.tsv"
    excluded = [
        (z == 9 and qc_excludes_9) or (z in (8, 9) and qc_excludes_8_9) for z in range(SHAPE[0])
    ]
    pd.DataFrame({"z": range(SHAPE[0]), "excluded": excluded}).to_csv(qc, sep="\t", index=False)
    scores = tmp_path / "scores.tsv"
    pd.DataFrame({"role": ["validation"], "threshold": [0.5]}).to_csv(scores, sep="\t", index=False)
    objects = tmp_path / "objects.ome.zarr"
    settings = dict(
        high=0.5,
        low=0.5,
        open_radius_nm=0,
        close_radius_nm=0,
        fill_holes=False,
        min_volume_um3=0,
        max_volume_um3=None,
        connectivity=26,
        block=[4, 16, 16],
        bridge_excluded=False,
    )
    objects_job(
        prob,
        qc,
        scores,
        objects,
        tmp_path / "o.tsv",
        tmp_path / "o.json",
        target="mito",
        settings=settings,
    )
    labels = tmp_path / "labels.tif"
    tifffile.imwrite(labels, (_boxes(TRUTH.values()) > 0).astype(np.uint8))
    tiles = tmp_path / "tiles"
    (tiles / "labels").mkdir(parents=True)
    roles = {0: "train", 1: "train", 2: "train", 3: "train", 4: "guard", 5: "validation"}
    roles.update({6: "validation", 8: "test", 9: "test"})
    registry = pd.DataFrame(
        {
            "tile_id": [f"t{z}" for z in roles],
            "dataset": "d1",
            "target": "mito",
            "level": 1,
            "z": list(roles),
            "y0": 0,
            "x0": 0,
            "height": 4,
            "width": 4,
            "source": "labels",
            "role": list(roles.values()),
        }
    )
    registry.to_csv(tiles / "tiles.tsv", sep="\t", index=False)
    for tile in registry["tile_id"]:
        Image.fromarray(np.zeros((4, 4), np.uint8)).save(tiles / "labels" / f"{tile}.png")
    files = {"objects": objects, "pyramid": tmp_path / "raw.ome.zarr", "labels": labels, "qc": qc}
    return tiles, {"d1": files}


def _run(tmp_path, tiles, inputs, **options):
    out = tmp_path / "out"
    evaluate_objects_job(
        tiles,
        inputs,
        out / "objects_3d.tsv",
        out / "objects_3d.png",
        out / "crops.png",
        target="mito",
        guard_sections=2,
        **options,
    )
    return out


def test_objects_are_scored_on_held_out_sections_against_connected_components(tmp_path):
    tiles, inputs = _scene(tmp_path)
    out = _run(tmp_path, tiles, inputs)
    row = read_objects_3d(out / "objects_3d.tsv").set_index("dataset").loc["d1"]
    # Worked by hand from the scene: on section 8 the true objects are A, B, E (C lies in
    # training sections, F on the excluded section 9), the predicted ones A', B1, B2, E' (D lies
    # in validation sections); A and E match (IoU 1), B does not (IoU 0.4 with each half, below
    # the common-practice 0.5).
    assert (row["truth_objects"], row["predicted_objects"], row["matched_objects"]) == (3, 4, 2)
    assert row["object_precision"] == pytest.approx(2 / 4)
    assert row["object_recall"] == pytest.approx(2 / 3)
    assert row["count_error"] == pytest.approx((4 - 3) / 3)
    assert row["matched_volume_error"] == pytest.approx(0.0)
    assert (row["sections"], row["first_section"], row["last_section"]) == (1, 8, 8)
    assert row["excluded_sections"] == 0  # section 9 lies outside 8..8
    assert row["truth_source"] == "26-connected components of the labels"
    # voxels of section 8, by hand: truth A 8 x 8, B 8 x 10, E 6 x 6 = 180; predicted A' 64,
    # B's halves 8 x 4 each (the gap x 18:20 is B's only missed part), E' 36 = 164, all on truth
    assert (row["true_voxels"], row["predicted_voxels"], row["shared_voxels"]) == (180, 164, 164)
    assert row["voxel_precision"] == 1.0
    assert row["voxel_jaccard"] == pytest.approx(164 / 180)
    assert row["voxel_f1"] == pytest.approx(2 * 164 / (180 + 164))
    overall = overall_objects_3d(out / "objects_3d.tsv")
    assert overall["object_f1"] == pytest.approx(2 * 2 / (3 + 4))
    assert overall["voxel_jaccard"] == pytest.approx(164 / 180)
    assert (out / "objects_3d.png").stat().st_size > 0 and (out / "crops.png").stat().st_size > 0


def test_sections_qc_keeps_are_scored(tmp_path):
    tiles, inputs = _scene(tmp_path, qc_excludes_9=False)
    out = _run(tmp_path, tiles, inputs)
    row = read_objects_3d(out / "objects_3d.tsv").set_index("dataset").loc["d1"]
    # by hand: sections 8 and 9 now; F (section 9, truth only) joins the true objects
    assert (row["truth_objects"], row["predicted_objects"], row["matched_objects"]) == (4, 4, 2)
    assert row["sections"] == 2
    # by hand: A, B and F lie within sections 8-9 but reach section 9, the volume's last, whose
    # face cuts them (what lies beyond was never imaged); E (z 6-9) reaches back into the
    # validation sections: none is whole, and the note says so
    assert row["truth_whole"] == 0
    assert row["note"].startswith("only 0 of 4 true objects lie whole within the scored sections")


def test_objects_that_extend_beyond_the_scored_sections_are_counted_and_named(tmp_path):
    # by hand: section 8 alone is scored; A and B go on into section 9, E back to section 6,
    # so none of the three true objects there is whole in it
    tiles, inputs = _scene(tmp_path)
    out = _run(tmp_path, tiles, inputs)
    table = read_objects_3d(out / "objects_3d.tsv").set_index("dataset")
    assert table.loc["d1", "truth_whole"] == 0 == table.loc["all", "truth_whole"]
    for row in ("d1", "all"):
        assert table.loc[row, "note"].startswith(
            "only 0 of 3 true objects lie whole within the scored sections: the others are "
            "scored on their cut part"
        )


def test_held_out_sections_without_labels_are_left_out_when_only_labelled_ones_count(tmp_path):
    # A label volume annotated on some sections only (here: all but section 9, left 0).
    tiles, inputs = _scene(tmp_path, qc_excludes_9=False)
    truth = _boxes(TRUTH.values()) > 0
    truth[9] = False
    tifffile.imwrite(inputs["d1"]["labels"], truth.astype(np.uint8))
    out = _run(tmp_path, tiles, inputs)
    row = read_objects_3d(out / "objects_3d.tsv").set_index("dataset").loc["d1"]
    # By hand: with every section counted as annotated, sections 8 and 9 are scored and the
    # true A and E end on section 8 while the predicted ones run on to 9: IoU 0.5 each, not
    # above the common-practice 0.5, so nothing matches (B is split in two as before).
    assert (row["sections"], row["matched_objects"]) == (2, 0) and pd.isna(row["note"])
    out = _run(tmp_path, tiles, inputs, sections="labelled")
    row = read_objects_3d(out / "objects_3d.tsv").set_index("dataset").loc["d1"]
    # Section 9 holds no label and is left out: the scores of section 8 alone, as in the first
    # test (A and E matched, B not).
    assert (row["truth_objects"], row["predicted_objects"], row["matched_objects"]) == (3, 4, 2)
    assert row["sections"] == 1
    assert row["note"] == "1 held-out section(s) without labels left out (sections: labelled)"


def _b_cut_in_two(folder):
    """An instance volume of the scene's truth with B cut at x = 19 into B and B2."""
    boxes = dict(TRUTH)
    boxes["B"] = (8, 10, 14, 22, 14, 19)
    boxes["B2"] = (8, 10, 14, 22, 19, 24)
    instances = folder / "instances.tif"
    tifffile.imwrite(instances, _boxes(boxes.values()))
    return instances


def test_instance_volume_is_used_when_given(tmp_path):
    tiles, inputs = _scene(tmp_path)
    # the instance volume cuts B into x 14:19 and x 19:24: each half now matches its predicted
    # box with IoU 4/5 (by hand), so every object on section 8 matches
    inputs["d1"]["instances"] = _b_cut_in_two(tmp_path)
    out = _run(tmp_path, tiles, inputs)
    row = read_objects_3d(out / "objects_3d.tsv").set_index("dataset").loc["d1"]
    assert (row["truth_objects"], row["predicted_objects"], row["matched_objects"]) == (4, 4, 4)
    assert row["truth_source"] == "instance volume"


def test_datasets_without_an_instance_volume_are_scored_against_label_components(tmp_path):
    tiles, inputs = _scene(tmp_path)
    # d2: the same scene under another (invented) id, without an instance volume
    registry = pd.read_csv(tiles / "tiles.tsv", sep="\t")
    second = registry.assign(dataset="d2", tile_id="d2_" + registry["tile_id"])
    pd.concat([registry, second]).to_csv(tiles / "tiles.tsv", sep="\t", index=False)
    for tile in second["tile_id"]:
        Image.fromarray(np.zeros((4, 4), np.uint8)).save(tiles / "labels" / f"{tile}.png")
    inputs["d2"] = dict(inputs["d1"])
    inputs["d1"]["instances"] = _b_cut_in_two(tmp_path)
    out = _run(tmp_path, tiles, inputs)
    table = read_objects_3d(out / "objects_3d.tsv").set_index("dataset")
    assert table.loc["d1", "truth_source"] == "instance volume"
    assert table.loc["d2", "truth_source"] == "26-connected components of the labels"
    # by hand, as in the two tests above: d1 4 true, 4 predicted, 4 matched; d2 3, 4, 2
    counts = ["truth_objects", "predicted_objects", "matched_objects"]
    assert list(table.loc["d1", counts]) == [4, 4, 4]
    assert list(table.loc["d2", counts]) == [3, 4, 2]
    assert list(table.loc["all", counts]) == [7, 8, 6]
    assert table.loc["all", "truth_source"] == (
        "26-connected components of the labels; instance volume"
    )


def test_bad_truth_volumes_and_missing_test_tiles_are_refused(tmp_path):
    tiles, inputs = _scene(tmp_path)
    wrong = tmp_path / "wrong.tif"
    tifffile.imwrite(wrong, np.zeros((10, 32, 30), np.uint8))
    inputs["d1"]["instances"] = wrong
    with pytest.raises(
        TesseraInputError,
        match=r"wrong.tif: instance volume has shape \(10, 32, 30\), the image \(10, 32, 32\)",
    ):
        _run(tmp_path, tiles, inputs)
    tifffile.imwrite(wrong, np.zeros(SHAPE, np.float32))
    with pytest.raises(
        TesseraInputError, match=r"instance volume must hold integers \(0 background\), got float32"
    ):
        _run(tmp_path, tiles, inputs)
    del inputs["d1"]["instances"]
    inputs["d1"]["labels"] = wrong
    with pytest.raises(TesseraInputError, match="label volume must hold integers"):
        _run(tmp_path, tiles, inputs)
    (tmp_path / "qc").mkdir()
    _, inputs = _scene(tmp_path / "qc", qc_excludes_8_9=True)
    with pytest.raises(
        TesseraInputError,
        match="no dataset has held-out sections to score the mito objects on "
        r"\(d1: every held-out section was excluded by QC: not scored\)",
    ):
        _run(tmp_path, tiles, inputs)
    registry = pd.read_csv(tiles / "tiles.tsv", sep="\t")
    registry.loc[registry["role"] == "test", "role"] = "guard"
    registry.to_csv(tiles / "tiles.tsv", sep="\t", index=False)
    with pytest.raises(
        TesseraInputError,
        match=r"tiles: no dataset has held-out sections to score the mito objects on \(d1: no "
        r"test tiles in this dataset: not scored\); annotate more tiles or change split.fractions",
    ):
        _run(tmp_path, tiles, inputs)
    assert not (tmp_path / "out" / "objects_3d.tsv").exists()


def test_config_takes_instances_only_beside_labels(repo):
    config = yaml.safe_load((repo / "config" / "config.yaml").read_text())
    schema = repo / "config" / "schemas" / "config.schema.yaml"
    good = copy.deepcopy(config)
    good["targets"]["mitochondria"]["annotations"]["instances"] = "truth/{dataset}_instances.tif"
    load_config(good, schema)
    alone = copy.deepcopy(config)
    alone["targets"]["mitochondria"]["annotations"] = {"instances": "truth/{dataset}_i.tif"}
    with pytest.raises(
        TesseraInputError,
        match="key targets.mitochondria.annotations: 'labels' is a dependency of 'instances'",
    ):
        load_config(alone, schema)
    both = copy.deepcopy(config)
    both["targets"]["mitochondria"]["annotations"]["painted"] = {"points": "p.tsv", "masks": "m"}
    with pytest.raises(
        TesseraInputError,
        match=r"key targets.mitochondria.annotations: .* should not be valid under "
        r"\{'required': \['labels', 'painted'\]\}",
    ):
        load_config(both, schema)
    fixed = copy.deepcopy(good)
    fixed["targets"]["mitochondria"]["annotations"]["instances"] = "truth/instances.tif"
    with pytest.raises(
        TesseraInputError,
        match=r"key targets.mitochondria.annotations.instances: 'truth/instances.tif' does not match",
    ):
        load_config(fixed, schema)


def test_methods_paragraph_quotes_the_3d_scores_it_is_given(tmp_path):
    tiles, inputs = _scene(tmp_path)
    out = _run(tmp_path, tiles, inputs)
    sections = {
        "qc": {"sharpness_sigma": 1.5, "exclude_flagged": True},
        "pyramid": {"levels": 3},
        "statistics": {"confidence": 0.95},
        "targets": {},
    }
    text = methods_text(
        sections,
        {"d1": {"condition": "warm", "subject": "m1"}},
        scores={},
        object_settings={},
        comparisons={},
        section_counts={"sections": 10, "excluded": 1},
        checksums=[],
        software={},
        objects_3d={"mito": overall_objects_3d(out / "objects_3d.tsv")},
    )
    # the hand-worked scene: F1 2 * 2 / (3 + 4), precision 2/4, recall 2/3, on section 8 only
    assert f"F1 {4 / 7:.3f} (precision 0.500, recall {2 / 3:.3f}" in text
    assert "the mito objects on 1 held-out test sections" in text
    assert "(26-connected components of the labels)" in text
    # by hand: none of A, B and E lies whole within section 8
    assert "only 0 of the 3 true objects lay whole within those sections" in text


def test_held_out_sections_keep_the_guard_distance_and_skip_other_roles():
    registry = pd.DataFrame(
        {
            "dataset": ["d1"] * 5 + ["d2"],
            "z": [3, 9, 6, 4, 12, 0],
            "role": ["test", "test", "train", "validation", "test", "test"],
        }
    )
    registry.loc[4, "dataset"] = "d2"
    # by hand, d1 in 12 sections: test tiles at 3 and 9, validation at 4, training at 6.
    # Sections 0-3 are nearest the test tile at 3; 4 holds the validation tile and 5 is nearer
    # it; 6 is training and 7 nearer it than to 9; 8-11 are nearest 9 and at least 2 from 6
    test_side = [0, 1, 2, 3, 8, 9, 10, 11]
    assert held_out_sections(registry, "d1", guard_sections=2, depth=12) == test_side
    # a section as near training as a test tile is not the test side's: guard 0 changes nothing
    assert held_out_sections(registry, "d1", guard_sections=0, depth=12) == test_side
    # a guard wider than the gap keeps sections away from training even on the test side
    assert held_out_sections(registry, "d1", guard_sections=3, depth=12) == [0, 1, 2, 3, 9, 10, 11]
    # guard tiles (dropped by the split) claim no sections: d2's test tiles at 0 and 12 share
    # its 13 sections, the middle one a tie
    registry.loc[len(registry)] = {"dataset": "d2", "z": 5, "role": "guard"}
    assert held_out_sections(registry, "d2", guard_sections=2, depth=13) == list(range(13))
    assert held_out_sections(registry, "d3", guard_sections=2, depth=12) == []


@pytest.mark.parametrize("guard", [1, 2, 3])
def test_held_out_sections_of_a_real_split_are_test_sections_apart_from_training(guard):
    rng = np.random.default_rng(guard)
    z = rng.integers(0, 40, 60)
    registry = pd.DataFrame(
        {
            "tile_id": [f"t{k}" for k in range(60)],
            "dataset": "d",
            "target": "m",
            "level": 0,
            "z": z,
            "y0": 0,
            "x0": 0,
            "height": 4,
            "width": 4,
            "source": "labels",
        }
    )
    split = split_tiles(registry, guard_sections=guard, seed=guard)
    sections = np.array(held_out_sections(split, "d", guard_sections=guard, depth=40))
    train = split.loc[split["role"] == "train", "z"].to_numpy()
    test = split.loc[split["role"] == "test", "z"].to_numpy()
    validation = split.loc[split["role"] == "validation", "z"].to_numpy()
    # the split's promise (README: held-out tiles are guard_sections apart in z from training)
    # holds for every scored section, every test tile's section is scored, no validation
    # tile's section is, and the scored sections are one run (the test side of the split)
    assert np.abs(sections[:, None] - train[None, :]).min() >= guard
    assert set(test.tolist()) <= set(sections.tolist())
    assert not set(validation.tolist()) & set(sections.tolist())
    assert np.all(np.diff(sections) == 1)


def test_a_dataset_without_test_tiles_gets_a_row_saying_so(tmp_path):
    tiles, inputs = _scene(tmp_path)
    inputs["d2"] = dict(inputs["d1"])  # no tile of the registry names d2
    out = _run(tmp_path, tiles, inputs)
    table = read_objects_3d(out / "objects_3d.tsv").set_index("dataset")
    assert table.loc["d2", "note"] == "no test tiles in this dataset: not scored"
    assert table.loc["d2", "sections"] == 0 and np.isnan(table.loc["d2", "object_f1"])
    # the pooled row holds d1's objects only (by hand, as in the first test) and names d2
    assert table.loc["all", "note"].startswith("not scored: d2; only 0 of 3 true objects")
    assert (table.loc["all", "truth_objects"], table.loc["all", "matched_objects"]) == (3, 2)


@pytest.mark.parametrize(
    ("damage", "message"),
    [
        # cut after the byte-order mark: tifffile's struct.error before any page is read
        ("cut", r"cannot read as TIFF: unpack requires a buffer"),
        # ImageWidth of the first page 0 (TIFF 6.0, tag 256): tifffile divides by it
        ("width", r"integer division or modulo by zero"),
    ],
)
def test_damaged_truth_volume_is_refused_in_one_line(tmp_path, damage, message):
    tiles, inputs = _scene(tmp_path)
    labels = inputs["d1"]["labels"]
    if damage == "cut":
        labels.write_bytes(labels.read_bytes()[:4])
    else:
        with tifffile.TiffFile(labels, mode="r+") as tif:
            tif.pages[0].tags["ImageWidth"].overwrite(0)
    with pytest.raises(TesseraInputError, match=message) as info:
        _run(tmp_path, tiles, inputs)
    assert str(info.value).startswith(str(labels)) and "\n" not in str(info.value)
