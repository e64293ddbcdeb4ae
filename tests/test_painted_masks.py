"""Painted masks checked together, over every dataset, before any is imported (rule check_masks)."""

import numpy as np
import pandas as pd
import pytest
import tifffile
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.tiles.sampling import labels_to_target_mask
from tessera.workflow.files.masks_check import read_masks_check
from tessera.workflow.files.tile_registry import read_annotation_set
from tessera.workflow.jobs.export_tiles import export_tiles_job
from tessera.workflow.jobs.import_tiles import check_masks_job, import_tiles_job
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.pyramid import pyramid_job

# Level-0 points (z, y, x) of each dataset; tiles of 16 px at downsample 2.
POINTS = {"d1": [(1, 40, 40), (4, 50, 60)], "d2": [(2, 60, 30)]}


def _dataset(root, dataset, *, excluded=(), shift=0):
    """Stack, truth, pyramid, QC table and exported tiles of one dataset; returns its paths.
    `shift` moves the content by that many pixels along x (a stack aligned again)."""
    rng = np.random.default_rng(len(dataset))
    zz, yy, xx = np.indices((6, 96, 96))
    truth = np.zeros((6, 96, 96), np.uint8)
    for z, y, x in POINTS[dataset]:
        truth[(yy - y) ** 2 + (xx - x - shift) ** 2 + (8 * (zz - z)) ** 2 < 100] = 1
    raw = np.clip(np.where(truth > 0, 90, 170) + rng.normal(0, 10, truth.shape), 0, 255)
    folder = root / dataset
    folder.mkdir(parents=True)
    tifffile.imwrite(folder / "raw.tif", raw.astype(np.uint8))
    ingest_job(folder / "raw.tif", folder / "raw.ome.zarr", fmt="tiff_stack", spacing=(40, 8, 8))
    pyramid_job(folder / "raw.ome.zarr", folder / "pyr.ome.zarr", levels=1)
    reasons = ["shift" if z in excluded else "" for z in range(6)]
    qc = pd.DataFrame({"z": range(6), "reason": reasons, "excluded": [r != "" for r in reasons]})
    qc.to_csv(folder / "sections.tsv", sep="\t", index=False)
    sheet = folder / "points.tsv"
    rows = ["dataset\ttarget\tz\ty\tx"] + [
        f"{dataset}\tmito\t{z}\t{y}\t{x}" for z, y, x in POINTS[dataset]
    ]
    sheet.write_text("\n".join(rows) + "\n")
    export_tiles_job(
        folder / "pyr.ome.zarr",
        sheet,
        folder / "to_paint",
        dataset=dataset,
        target="mito",
        downsample=2,
        size=16,
        datasets=[dataset],
        targets=["mito"],
    )
    return {
        "truth": truth,
        "exported": folder / "to_paint",
        "pyramid": folder / "pyr.ome.zarr",
        "qc": folder / "sections.tsv",
    }


def _paint(data, masks):
    """Every exported tile's mask from the truth at the working level, as 0/255 PNGs."""
    masks.mkdir(exist_ok=True)
    working = labels_to_target_mask(data["truth"], factors=(1, 2, 2))
    table = pd.read_csv(data["exported"] / "tiles.tsv", sep="\t")
    for r in table.itertuples():
        crop = working[r.z, r.y0 : r.y0 + r.height, r.x0 : r.x0 + r.width]
        Image.fromarray(crop.astype(np.uint8) * 255).save(masks / f"{r.tile_id}.png")
    return list(table["tile_id"])


def _check(data, masks, out, **options):
    return check_masks_job(
        {d: v["exported"] for d, v in data.items()},
        masks,
        {d: v["pyramid"] for d, v in data.items()},
        {d: v["qc"] for d, v in data.items()},
        out,
        **options,
    )


def test_masks_painted_before_a_stack_was_aligned_again_are_refused(tmp_path):
    # A mask labels the pixels it was painted on (common practice: annotations belong to one
    # image). After the stack is aligned again (content moved 12 px), its tiles are exported
    # again under the same ids; the earlier masks would label other pixels, so they are refused
    # until painted again. Re-exporting identical pixels, or new masks, pass.
    record = tmp_path / "d1.painted_on.json"
    before = {"d1": _dataset(tmp_path / "before", "d1")}
    masks = tmp_path / "masks"
    tiles = _paint(before["d1"], masks)
    _check(before, masks, tmp_path / "check.json", painted_on={"d1": record})
    import_tiles_job(
        before["d1"]["exported"],
        masks,
        tmp_path / "set",
        check=tmp_path / "check.json",
        out_painted_on=record,
    )
    same = {"d1": _dataset(tmp_path / "same", "d1")}
    _check(same, masks, tmp_path / "check.json", painted_on={"d1": record})
    aligned = {"d1": _dataset(tmp_path / "aligned", "d1", shift=12)}
    with pytest.raises(TesseraInputError) as info:
        _check(aligned, masks, tmp_path / "again.json", painted_on={"d1": record})
    assert str(info.value) == (
        f"{masks / (tiles[0] + '.png')}: the pixels of 2 painted tile(s) ({tiles[0]}, "
        f"{tiles[1]}) changed since their masks were imported, the masks did not: the stack "
        "was replaced or re-aligned after painting, and the masks would label other pixels; "
        f"expected masks painted on the new tiles: paint them again, or delete {record} to "
        "accept them as they are"
    )
    assert not (tmp_path / "again.json").exists()
    _paint(aligned["d1"], masks)  # painted again on the aligned tiles
    _check(aligned, masks, tmp_path / "again.json", painted_on={"d1": record})


def test_missing_masks_of_every_dataset_are_listed_in_one_line_with_stray_files(tmp_path):
    data = {d: _dataset(tmp_path, d) for d in POINTS}
    masks = tmp_path / "masks"
    painted = _paint(data["d1"], masks)
    (masks / f"{painted[0]}.png").rename(masks / "d1_typo.png")  # saved under a mistyped name
    with pytest.raises(TesseraInputError) as info:
        _check(data, masks, tmp_path / "check.json")
    message = str(info.value)
    d2_tile = pd.read_csv(data["d2"]["exported"] / "tiles.tsv", sep="\t")["tile_id"][0]
    folders = f"{data['d1']['exported']}, {data['d2']['exported']}"
    assert message == (
        f"{masks}: no mask yet for 2 of 3 tiles ({painted[0]}, {d2_tile}): paint the tiles in "
        f"{folders} (previews *.preview.png) and save each mask here as <tile_id>.png (0 = "
        "background, 1 or 255 = target); files here that are no tile's mask: d1_typo.png"
    )
    assert not (tmp_path / "check.json").exists()


def test_a_tile_on_a_section_qc_excluded_is_refused_before_painting_counts(tmp_path):
    # The model reads an excluded section's nearest kept neighbour in its place (training and
    # prediction alike), so a mask painted on the excluded section would not match the image
    # the model learns from.
    data = {"d1": _dataset(tmp_path, "d1", excluded=(4,))}
    _paint(data["d1"], tmp_path / "masks")
    with pytest.raises(TesseraInputError) as info:
        _check(data, tmp_path / "masks", tmp_path / "check.json")
    tile = pd.read_csv(data["d1"]["exported"] / "tiles.tsv", sep="\t")["tile_id"][1]
    assert str(info.value) == (
        f"{data['d1']['qc']}: tile {tile!r} (dataset d1) lies on section 4 (shift), which "
        "section QC excluded: the model reads the nearest kept section in its place, so the "
        "mask would be learnt against another section's image; move the tile's point to a kept "
        "section (see the dataset's sections.png), or set qc.exclude_flagged: false in "
        "config/config.yaml"
    )
    assert not (tmp_path / "check.json").exists()


def test_import_registers_only_the_masks_checked(tmp_path):
    data = {d: _dataset(tmp_path, d) for d in POINTS}
    masks = tmp_path / "masks"
    for d in data:
        _paint(data[d], masks)
    (masks / "d1 copy.png").write_bytes(
        (masks / f"{_paint(data['d1'], masks)[0]}.png").read_bytes()
    )
    check = tmp_path / "check.json"
    summary = _check(data, masks, check)
    assert summary["masks"] == 3 and summary["unmatched_files"] == ["d1 copy.png"]
    record = read_masks_check(check)
    assert sorted(v["dataset"] for v in record.values()) == ["d1", "d1", "d2"]
    import_tiles_job(data["d1"]["exported"], masks, tmp_path / "set", check=check)
    registry, labels = read_annotation_set(tmp_path / "set")
    assert len(registry) == 2 and all(set(np.unique(v)) <= {0, 1} for v in labels.values())
    # a mask painted again after the check is not imported unchecked
    tile = registry["tile_id"][0]
    inverted = 255 - np.asarray(Image.open(masks / f"{tile}.png"))
    Image.fromarray(inverted).save(masks / f"{tile}.png")
    with pytest.raises(
        TesseraInputError,
        match=rf"mask {tile}\.png changed since it was checked; run the workflow again so that "
        "rule check_masks checks it",
    ):
        import_tiles_job(data["d1"]["exported"], masks, tmp_path / "set2", check=check)
    assert not (tmp_path / "set2").exists()
