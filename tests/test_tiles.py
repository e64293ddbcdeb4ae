"""Annotation tiles: export, painted-mask import, sampling from label volumes.

References named beside each check: numpy / scikit-image / Pillow / tifffile as reference
libraries, the open ssTEM stack of Gerhard et al. 2013 (doi:10.6084/m9.figshare.856713), and
common practice of the field (marked so).
"""

import logging
import os
import pickle
import struct
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile
import zarr
from PIL import Image
from skimage.exposure import rescale_intensity
from skimage.transform import downscale_local_mean

from tessera.errors import TesseraInputError
from tessera.tiles.sampling import labels_to_target_mask, sample_tiles_from_labels
from tessera.workflow.files.points import check_points_in_annotated, read_points
from tessera.workflow.files.tile_registry import (
    read_annotation_set,
    read_registry,
    write_annotation_set,
)
from tessera.workflow.files.to_paint import export_tiles, import_painted, read_painted_mask
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.pyramid import pyramid_job
from tessera.workflow.jobs.sample_tiles import check_labels_job, sample_tiles_job

FACTORS = (1, 2, 2)


POINTS = [(1, 40, 40), (4, 50, 60), (2, 60, 30)]


def volume(shape=(6, 96, 96), seed=0, centres=()):
    """A uint8 image and a blob-like truth label volume (level 0); blobs at `centres` too."""
    rng = np.random.default_rng(seed)
    zz, yy, xx = np.indices(shape)
    truth = np.zeros(shape, dtype=np.uint16)
    blobs = [(c, 10.0) for c in centres] + [
        (
            (rng.uniform(0, shape[0]), rng.uniform(0, shape[1]), rng.uniform(0, shape[2])),
            rng.uniform(6, 14),
        )
        for _ in range(8)
    ]
    for k, ((cz, cy, cx), r) in enumerate(blobs, start=1):
        truth[((yy - cy) ** 2 + (xx - cx) ** 2 + (4 * (zz - cz)) ** 2) < r * r] = k
    raw = np.where(truth > 0, 90, 170) + rng.normal(0, 12, shape)
    return np.clip(np.rint(raw), 0, 255).astype(np.uint8), truth


def write_points(path, rows, columns=("dataset", "target", "z", "y", "x")):
    lines = ["\t".join(columns)] + ["\t".join(str(v) for v in r) for r in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def save_png(path, array):
    Image.fromarray(array).save(path)
    return path


def listing(directory):
    return sorted(p.name for p in Path(directory).iterdir())


@pytest.fixture
def exported(tmp_path):
    raw0, truth0 = volume(centres=POINTS)
    level1 = np.rint(downscale_local_mean(raw0, FACTORS)).astype(np.uint8)
    store = zarr.create_array(
        store=str(tmp_path / "level1.zarr"), shape=level1.shape, chunks=(1, 16, 16), dtype="uint8"
    )
    store[:] = level1
    sheet = write_points(tmp_path / "points.tsv", [("d1", "mito", *p) for p in POINTS])
    points = read_points(sheet, datasets=["d1", "d2"], targets=["mito", "nuclei"])
    out = tmp_path / "tiles"
    registry = export_tiles(store, points, level=1, factors=FACTORS, size=16, out_dir=out)
    return {
        "raw0": raw0,
        "truth0": truth0,
        "level1": level1,
        "registry": registry,
        "out": out,
        "points": points,
        "store": store,
        "tmp": tmp_path,
    }


def paint(exported, masks_dir, *, fg=255, ignore=None):
    """Paint every exported tile from the truth, as a person would, as 0/fg PNGs."""
    masks_dir.mkdir(exist_ok=True)
    truth1 = labels_to_target_mask(exported["truth0"], factors=FACTORS)
    expected = {}
    for r in exported["registry"].itertuples(index=False):
        t = truth1[r.z, r.y0 : r.y0 + r.height, r.x0 : r.x0 + r.width]
        img = np.where(t > 0, fg, 0).astype(np.uint8)
        lab = t.astype(np.uint8)
        if ignore is not None:
            img[0, :] = ignore
            lab[0, :] = 255
        save_png(masks_dir / f"{r.tile_id}.png", img)
        expected[r.tile_id] = lab
    return expected


# --------------------------------------------------------------------------------------------
# export -> paint -> import


def test_export_writes_tiles_previews_and_registry(exported):
    out, reg, level1 = exported["out"], exported["registry"], exported["level1"]
    assert listing(out) == sorted(
        ["tiles.tsv"] + [f"{t}{s}" for t in reg["tile_id"] for s in (".tif", ".preview.png")]
    )
    for p, r in zip(exported["points"].itertuples(), reg.itertuples(), strict=True):
        # centre mapped to the level by integer division; tile of 16 centred as y - size // 2
        assert (r.z, r.y0, r.x0) == (p.z, p.y // 2 - 8, p.x // 2 - 8)
        # reference: numpy slicing of the whole level, read back with tifffile
        cut = level1[r.z, r.y0 : r.y0 + 16, r.x0 : r.x0 + 16]
        np.testing.assert_array_equal(tifffile.imread(out / f"{r.tile_id}.tif"), cut)
        # reference: skimage.exposure.rescale_intensity over the 1st-99th percentile range
        lo, hi = np.percentile(cut, [1, 99])
        ref = rescale_intensity(cut.astype(np.float64), in_range=(lo, hi), out_range=(0, 255))
        got = np.asarray(Image.open(out / f"{r.tile_id}.preview.png"))
        assert np.abs(got.astype(int) - np.rint(ref)).max() <= 1
    assert set(reg["source"]) == {"painted"} and set(reg["level"]) == {1}
    pd.testing.assert_frame_equal(read_registry(out / "tiles.tsv"), reg)


def test_round_trip_export_paint_import_store(exported):
    expected = paint(exported, exported["tmp"] / "masks")
    reg, labels = import_painted(exported["out"], exported["tmp"] / "masks")
    assert sorted(labels) == sorted(exported["registry"]["tile_id"])
    for tid, lab in expected.items():
        np.testing.assert_array_equal(labels[tid], lab)
        assert labels[tid].dtype == np.uint8
    target = exported["tmp"] / "set"
    write_annotation_set(target, reg, labels)
    assert listing(target) == ["labels", "tiles.tsv"]
    reg2, labels2 = read_annotation_set(target)
    pd.testing.assert_frame_equal(reg2, reg)
    for tid in labels:
        np.testing.assert_array_equal(labels2[tid], labels[tid])


def test_import_maps_ignore_value_to_255(exported):
    # unsure pixels carry their own value and are ignored (common practice, see FIELD.md)
    expected = paint(exported, exported["tmp"] / "masks", fg=255, ignore=128)
    _, labels = import_painted(exported["out"], exported["tmp"] / "masks", ignore_value=128)
    for tid, lab in expected.items():
        np.testing.assert_array_equal(labels[tid], lab)
        assert (labels[tid][0] == 255).all()


def test_missing_mask_names_tile_and_expected_file(exported):
    paint(exported, exported["tmp"] / "masks")
    gone = exported["registry"].loc[1, "tile_id"]
    (exported["tmp"] / "masks" / f"{gone}.png").unlink()
    with pytest.raises(TesseraInputError, match=rf"{gone}.*{gone}\.png"):
        import_painted(exported["out"], exported["tmp"] / "masks")


def test_points_in_a_dataset_left_out_of_annotated_datasets_are_refused(tmp_path):
    # annotated_datasets names the datasets that give a target's tiles (config schema); a
    # point elsewhere would make a measured-only dataset a training one without a word.
    sheet = write_points(
        tmp_path / "points.tsv",
        [("d1", "mito", 0, 40, 40), ("d2", "mito", 1, 10, 60), ("d2", "nuclei", 1, 10, 60)],
    )
    points = read_points(sheet, datasets=["d1", "d2"], targets=["mito", "nuclei"])
    check_points_in_annotated(points, target="mito", annotated=None)
    check_points_in_annotated(points, target="nuclei", annotated=["d2"])
    with pytest.raises(TesseraInputError) as info:
        check_points_in_annotated(points, target="mito", annotated=["d1"])
    assert str(info.value) == (
        f"{sheet}: row 3, column 'dataset': mito points in d2, which "
        "targets.mito.annotated_datasets leaves out (['d1']); expected points in those "
        "datasets only: add d2 to annotated_datasets or remove those rows"
    )


def test_export_rejects_tile_outside_volume_and_writes_nothing(exported, tmp_path):
    sheet = write_points(
        tmp_path / "edge.tsv", [("d1", "mito", 0, 40, 40), ("d1", "mito", 1, 10, 60)]
    )
    points = read_points(sheet, datasets=["d1"], targets=["mito"])
    before = listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match=r"edge\.tsv.*row 3 .*tile around .*outside the image of shape"
    ):
        export_tiles(
            exported["store"],
            points,
            level=1,
            factors=FACTORS,
            size=16,
            out_dir=tmp_path / "edge_tiles",
        )
    assert listing(tmp_path) == before

    def refused(name, point, size):
        """The one line refusing a sheet of one point, after checking nothing was written."""
        sheet = write_points(tmp_path / f"{name}.tsv", [("d1", "mito", *point)])
        points = read_points(sheet, datasets=["d1"], targets=["mito"])
        out = tmp_path / f"{name}_tiles"
        with pytest.raises(TesseraInputError) as info:
            export_tiles(
                exported["store"], points, level=1, factors=FACTORS, size=size, out_dir=out
            )
        assert not out.exists()
        return sheet, str(info.value)

    # a section beyond the stack (6 sections) is named as such, not as an edge in plane
    sheet, message = refused("deep", (6, 40, 40), 16)
    assert message == (
        f"{sheet}: row 2 (tile 'd1-mito-z6-y40-x40'): section z=6 lies beyond the stack "
        "(level-1 section 6; the image has 6 sections at level 1, 6 at most at full "
        "resolution); expected a section of the stack, numbered from 0"
    )
    # a tile larger than the sections (48 x 48 px at level 1) fits nowhere: the size is named,
    # in the working level's pixels, not the point
    _, message = refused("big", (1, 48, 48), 64)
    assert message.endswith(
        "a tile of 64 x 64 px is larger than the level-1 sections (48 x 48 px); tile sizes "
        "count pixels of the working level (downsample): set the row's size, or the target's "
        "tiles.size, to at most 48"
    )


def test_export_uses_per_row_size(tmp_path):
    img = np.arange(3 * 40 * 40, dtype=np.uint32).reshape(3, 40, 40).astype(np.uint8)
    sheet = write_points(
        tmp_path / "p.tsv",
        [("d", "m", 0, 20, 20, "a", ""), ("d", "m", 1, 20, 20, "b", "6")],
        columns=("dataset", "target", "z", "y", "x", "tile_id", "size"),
    )
    pts = read_points(sheet, datasets=["d"], targets=["m"])
    reg = export_tiles(img, pts, level=0, factors=(1, 1, 1), size=10, out_dir=tmp_path / "t")
    assert reg["height"].tolist() == [10, 6]
    np.testing.assert_array_equal(tifffile.imread(tmp_path / "t" / "b.tif"), img[1, 17:23, 17:23])


# --------------------------------------------------------------------------------------------
# points sheet


@pytest.mark.parametrize(
    "row, message",
    [
        (("d9", "mito", 1, 40, 40), r"row 3, column 'dataset': unknown dataset 'd9'"),
        (("d1", "golgi", 1, 40, 40), r"row 3.*target.*'golgi'"),
        (("d1", "mito", 1, -4, 40), r"row 3.*'y'.*-4"),
        (("d1", "mito", 1.5, 4, 40), r"row 3.*'z'.*1\.5"),
        (("d1", "mito", 1, "", 40), r"row 3.*'y'.*''"),
    ],
)
def test_points_errors_name_file_and_row(tmp_path, row, message):
    sheet = write_points(tmp_path / "points.tsv", [("d1", "mito", 0, 10, 10), row])
    with pytest.raises(TesseraInputError, match=rf"points\.tsv.*{message}"):
        read_points(sheet, datasets=["d1"], targets=["mito"])


def test_points_reject_unknown_column_and_duplicate_ids(tmp_path):
    sheet = write_points(
        tmp_path / "p.tsv",
        [("d1", "mito", 0, 10, 10, 3)],
        columns=("dataset", "target", "z", "y", "x", "colour"),
    )
    with pytest.raises(TesseraInputError, match=r"p\.tsv.*unknown \['colour'\]"):
        read_points(sheet, datasets=["d1"], targets=["mito"])
    sheet = write_points(tmp_path / "q.tsv", [("d1", "mito", 0, 10, 10)] * 2)
    with pytest.raises(TesseraInputError, match=r"q\.tsv.*duplicate"):
        read_points(sheet, datasets=["d1"], targets=["mito"])


def test_points_row_with_extra_cells_is_one_line(tmp_path):
    # A tab typed into a cell gives its row more fields than the header; pandas' tokenizer
    # message for it ends in a newline, which must not reach the one-line error.
    sheet = tmp_path / "points.tsv"
    sheet.write_text("dataset\ttarget\tz\ty\tx\nd1\tmito\t0\t10\t10\nd1\tmi\tto\t0\t1\t1\n")
    with pytest.raises(
        TesseraInputError, match=r"points\.tsv: not a readable tab-separated"
    ) as info:
        read_points(sheet, datasets=["d1"], targets=["mito"])
    assert "\n" not in str(info.value)


def test_points_sheet_as_spreadsheets_save_it_reads_like_the_datasets_sheet(tmp_path):
    # Spreadsheet exports (common practice) leave trailing tabs, a byte-order mark or CRLF line
    # ends: read as the plain sheet. A sheet saved comma-separated is named as such, one line.
    plain = read_points(
        write_points(tmp_path / "a.tsv", [("d1", "mito", 0, 10, 10)]),
        datasets=["d1"],
        targets=["mito"],
    )
    exported = tmp_path / "b.tsv"
    exported.write_bytes(
        "\ufeffdataset\ttarget\tz\ty\tx\t\t\r\nd1\tmito\t0\t10\t10\t\t\r\n".encode()
    )
    pd.testing.assert_frame_equal(
        read_points(exported, datasets=["d1"], targets=["mito"]), plain, check_like=True
    )
    commas = tmp_path / "c.tsv"
    commas.write_text("dataset,target,z,y,x\nd1,mito,0,10,10\n")
    with pytest.raises(TesseraInputError) as info:
        read_points(commas, datasets=["d1"], targets=["mito"])
    assert str(info.value) == (
        f"{commas}: header: one column 'dataset,target,z,y,x'; expected columns separated by "
        "tabs, found them separated by ',': save the table as tab-separated text"
    )


def test_points_may_mark_a_tile_to_be_trained_on(tmp_path):
    # The optional role column: blank (the split decides) or train; anything else is one line
    # naming the row and column.
    sheet = tmp_path / "p.tsv"
    sheet.write_text(
        "dataset\ttarget\tz\ty\tx\trole\nd1\tmito\t0\t10\t10\ttrain\nd1\tmito\t2\t10\t10\t\n"
    )
    points = read_points(sheet, datasets=["d1"], targets=["mito"])
    assert points["role"].tolist() == ["train", ""]
    sheet.write_text("dataset\ttarget\tz\ty\tx\trole\nd1\tmito\t0\t10\t10\ttest\n")
    with pytest.raises(TesseraInputError) as info:
        read_points(sheet, datasets=["d1"], targets=["mito"])
    assert str(info.value) == (
        f"{sheet}: row 2, column 'role': 'test'; expected blank (the split decides) or 'train'"
    )


class _RunsOnLoad:
    """Unpickling this creates a folder: a stand-in for code hidden in a data file."""

    def __init__(self, folder):
        self.folder = str(folder)

    def __reduce__(self):
        return (os.mkdir, (self.folder,))


def test_points_cells_are_data_never_code(tmp_path):
    # pandas reads every cell as text (dtype=str); coordinates must be plain integers
    marker = tmp_path / "ran"
    sheet = write_points(
        tmp_path / "points.tsv", [("d1", "mito", f"__import__('os').mkdir('{marker}')", 10, 10)]
    )
    with pytest.raises(
        TesseraInputError,
        match=r"points\.tsv: row 2, column 'z': expected a whole number >= 0, got",
    ):
        read_points(sheet, datasets=["d1"], targets=["mito"])
    formula = write_points(tmp_path / "f.tsv", [("d1", "mito", "=1+1", 10, 10)])
    with pytest.raises(TesseraInputError, match=r"f\.tsv: row 2, column 'z'"):
        read_points(formula, datasets=["d1"], targets=["mito"])
    assert not marker.exists()


@pytest.mark.parametrize("tile_id", ["../../etc/passwd", "/tmp/x", "a/b", "a\\b", ".."])
def test_points_tile_ids_cannot_name_other_folders(tmp_path, tile_id):
    # a tile id becomes a file name (<tile_id>.tif, <tile_id>.png); POSIX path rules make "/" and
    # ".." reach other folders, so ids are restricted to letters, digits, "_" and "-"
    sheet = write_points(
        tmp_path / "p.tsv",
        [("d1", "mito", 0, 10, 10, tile_id)],
        columns=("dataset", "target", "z", "y", "x", "tile_id"),
    )
    with pytest.raises(
        TesseraInputError, match=r"p\.tsv: row 2, column 'tile_id': .* must match \[A-Za-z0-9_-\]\+"
    ):
        read_points(sheet, datasets=["d1"], targets=["mito"])


# --------------------------------------------------------------------------------------------
# painted masks


def mask_pair():
    rng = np.random.default_rng(3)
    lab = (rng.random((12, 10)) < 0.4).astype(np.uint8)
    lab[0, 0], lab[0, 1] = 0, 1
    return lab


def test_mask_encodings_read_identically(tmp_path):
    # Editors save 0/1, 0/255, grey RGB(A), palette and 16-bit images (common practice).
    lab = mask_pair()
    files = {
        "01.png": save_png(tmp_path / "01.png", lab),
        "0255.png": save_png(tmp_path / "0255.png", lab * 255),
        "rgb.png": save_png(tmp_path / "rgb.png", np.repeat((lab * 255)[..., None], 3, axis=2)),
        "rgba.png": save_png(
            tmp_path / "rgba.png", np.dstack([lab * 255] * 3 + [np.full_like(lab, 255)])
        ),
        "p.png": tmp_path / "p.png",
        "16.png": tmp_path / "16.png",
        "16.tif": tmp_path / "16.tif",
        "1bit.png": tmp_path / "1bit.png",
        "8.tif": tmp_path / "8.tif",
    }
    Image.fromarray(lab * 255).convert("P").save(files["p.png"])
    Image.fromarray(lab.astype(np.uint16) * 255).save(files["16.png"])  # Pillow writes I;16
    tifffile.imwrite(files["16.tif"], lab.astype(np.uint16) * 65535)
    Image.fromarray(lab.astype(bool)).save(files["1bit.png"])
    tifffile.imwrite(files["8.tif"], lab)
    for name, f in files.items():
        got = read_painted_mask(f, shape=lab.shape)
        assert got.dtype == np.uint8, name
        np.testing.assert_array_equal(got, lab, err_msg=name)


@pytest.mark.parametrize(
    ("damage", "message"),
    [
        # IDAT's length field 8 too small (PNG specification, section 5.3: length, type, data,
        # CRC-32): Pillow read the next chunk header from inside the data, SyntaxError
        ("png length", r"PNG chunk IDAT at byte 33 fails its CRC-32"),
        ("tiff width", r"integer division or modulo by zero"),  # ImageWidth 0 (TIFF 6.0)
    ],
)
def test_damaged_mask_is_refused_in_one_line(tmp_path, damage, message):
    lab = mask_pair()
    if damage == "tiff width":
        path = tmp_path / "m.tif"
        tifffile.imwrite(path, lab * 255, photometric="minisblack")
        with tifffile.TiffFile(path, mode="r+") as tif:
            tif.pages[0].tags["ImageWidth"].overwrite(0)
    else:
        path = save_png(tmp_path / "m.png", lab * 255)
        data = bytearray(path.read_bytes())
        at = data.index(b"IDAT") - 4
        (length,) = struct.unpack(">I", data[at : at + 4])
        data[at : at + 4] = struct.pack(">I", length - 8)
        path.write_bytes(bytes(data))
    with pytest.raises(TesseraInputError, match=message) as info:
        read_painted_mask(path, shape=lab.shape)
    assert str(info.value).startswith(str(path)) and "\n" not in str(info.value)


def test_zero_one_mask_with_ignore_255(tmp_path):
    lab = mask_pair()
    img = lab.copy()
    img[5:7] = 255
    got = read_painted_mask(save_png(tmp_path / "m.png", img), shape=lab.shape, ignore_value=255)
    expected = lab.copy()
    expected[5:7] = 255
    np.testing.assert_array_equal(got, expected)


@pytest.mark.parametrize(
    "case, message",
    [
        ("shape", r"expected a mask of shape \(12, 10\)"),
        ("float", r"integer pixels.*float32"),
        ("seven", r"unexpected values \[7\]"),
        ("both", r"unexpected values \[1, 255\].*ignore"),
        # a grey unsure band without ignore_value: the key that declares it is named
        ("band", r"unexpected values \[128\]; .*give it as the ignore value \(ignore_value\)$"),
        # a lossy save: stray grey levels around every edge
        ("lossy", r"unexpected values \[2, 3, 4, 250\]; .*many grey levels: .*save as PNG$"),
        ("background", r"the mask has no target pixels.*\(allow_single_class\)$"),
        ("foreground", r"the mask has no background pixels"),
        ("colour", r"colour pixels"),
    ],
)
def test_bad_masks_raise_naming_the_file(tmp_path, case, message):
    lab = mask_pair()
    path = tmp_path / f"bad-{case}.png"
    if case == "shape":
        save_png(path, lab[:, :8] * 255)
    elif case == "float":
        path = path.with_suffix(".tif")
        tifffile.imwrite(path, lab.astype(np.float32))
    elif case == "seven":
        save_png(path, lab * 7)
    elif case == "both":
        img = lab * 255
        img[0, 2] = 1
        save_png(path, img)
    elif case == "band":
        img = lab * 255
        img[0] = 128
        save_png(path, img)
    elif case == "lossy":
        img = lab * 255
        img[0, :4] = (2, 3, 4, 250)
        save_png(path, img)
    elif case == "background":
        save_png(path, np.zeros_like(lab))
    elif case == "foreground":
        save_png(path, np.full_like(lab, 255))
    elif case == "colour":
        rgb = np.repeat((lab * 255)[..., None], 3, axis=2)
        rgb[0, 0] = (255, 0, 0)
        save_png(path, rgb)
    with pytest.raises(TesseraInputError, match=rf"{path.name}.*{message}"):
        read_painted_mask(path, shape=lab.shape)


@pytest.mark.parametrize(
    ("suffix", "message"), [(".png", "cannot read the image"), (".tif", "cannot read as TIFF")]
)
def test_mask_files_are_decoded_as_images_never_unpickled(tmp_path, suffix, message):
    # Pillow and tifffile recognise files by their signature (PNG: 89 50 4E 47, TIFF: II*\\0 or
    # MM\\0*, per the PNG and TIFF 6.0 specifications); a pickle stream matches neither.
    payload = pickle.dumps(_RunsOnLoad(tmp_path / "ran"))
    pickle.loads(
        pickle.dumps(_RunsOnLoad(tmp_path / "control"))
    )  # the payload is live when unpickled
    assert (tmp_path / "control").is_dir()
    path = tmp_path / f"t{suffix}"
    path.write_bytes(payload)
    with pytest.raises(TesseraInputError, match=rf"t\{suffix}: {message}"):
        read_painted_mask(path, shape=(4, 4))
    assert not (tmp_path / "ran").exists()


def test_single_class_allowed_when_asked(tmp_path):
    path = save_png(tmp_path / "empty.png", np.zeros((4, 4), np.uint8))
    assert not read_painted_mask(path, shape=(4, 4), allow_single_class=True).any()


def test_bad_mask_in_import_writes_nothing(exported):
    paint(exported, exported["tmp"] / "masks")
    tid = exported["registry"].loc[0, "tile_id"]
    save_png(exported["tmp"] / "masks" / f"{tid}.png", np.full((16, 16), 7, np.uint8))
    before = listing(exported["tmp"])
    with pytest.raises(TesseraInputError, match=rf"{tid}\.png.*\[7\]"):
        import_painted(exported["out"], exported["tmp"] / "masks")
    assert listing(exported["tmp"]) == before


def test_write_annotation_set_rejects_bad_labels_and_writes_nothing(tmp_path):
    reg = pd.DataFrame(
        {
            "tile_id": ["a"],
            "dataset": ["d"],
            "target": ["m"],
            "level": [0],
            "z": [0],
            "y0": [0],
            "x0": [0],
            "height": [4],
            "width": [4],
            "source": ["labels"],
        }
    )
    for bad in (
        np.full((4, 4), 2, np.uint8),
        np.zeros((4, 5), np.uint8),
        np.zeros((4, 4), np.float32),
    ):
        with pytest.raises(TesseraInputError, match="'a'"):
            write_annotation_set(tmp_path / "set", reg, {"a": bad})
    with pytest.raises(TesseraInputError, match=r"row 1.*'z'.*-1"):
        write_annotation_set(
            tmp_path / "set", reg.assign(z=[-1]), {"a": np.zeros((4, 4), np.uint8)}
        )
    assert listing(tmp_path) == []


def test_read_annotation_set_validates_stored_labels(tmp_path):
    reg = pd.DataFrame(
        {
            "tile_id": ["a"],
            "dataset": ["d"],
            "target": ["m"],
            "level": [0],
            "z": [0],
            "y0": [0],
            "x0": [0],
            "height": [4],
            "width": [4],
            "source": ["labels"],
        }
    )
    write_annotation_set(tmp_path / "set", reg, {"a": np.eye(4, dtype=np.uint8)})
    save_png(tmp_path / "set" / "labels" / "a.png", np.full((4, 4), 9, np.uint8))
    with pytest.raises(TesseraInputError, match=r"a\.png.*\[9\]"):
        read_annotation_set(tmp_path / "set")


# --------------------------------------------------------------------------------------------
# label volumes


@pytest.mark.parametrize("factors", [(1, 2, 2), (1, 4, 4), (2, 2, 2)])
def test_target_mask_is_majority_of_downscale_local_mean(factors):
    # Reference library: skimage.transform.downscale_local_mean of the binary mask, > 0.5.
    _, truth = volume(shape=(4, 64, 64), seed=5)
    got = labels_to_target_mask(truth, factors=factors)
    expected = downscale_local_mean((truth > 0).astype(np.float64), factors) > 0.5
    assert got.dtype == np.uint8
    np.testing.assert_array_equal(got, expected)
    assert 0 < got.mean() < 1


def sampled(label_source, **options):
    base = dict(
        dataset="d1",
        target="mito",
        level=1,
        factors=FACTORS,
        size=16,
        count=12,
        seed=4,
        exclude_z=(2, 5),
    )
    base.update(options)
    return sample_tiles_from_labels(label_source, **base)


def test_sampling_deterministic_inside_and_off_excluded_sections(tmp_path):
    _, truth = volume(shape=(8, 96, 96))
    store = zarr.create_array(
        store=str(tmp_path / "truth.zarr"), shape=truth.shape, chunks=(1, 32, 32), dtype="uint16"
    )
    store[:] = truth
    reg, labels = sampled(store)
    reg2, labels2 = sampled(truth)
    pd.testing.assert_frame_equal(reg, reg2)
    assert all((labels[t] == labels2[t]).all() for t in labels)
    other, _ = sampled(truth, seed=5)
    assert not other[["z", "y0", "x0"]].equals(reg[["z", "y0", "x0"]])
    # common practice: tiles of each dataset are an independent sample, so two stacks of the
    # same shape (or the same stack under two names) with the same seed get other places
    twin, _ = sampled(truth, dataset="twin")
    assert not twin[["z", "y0", "x0"]].equals(reg[["z", "y0", "x0"]])
    assert len(reg) == 12 and set(reg["source"]) == {"labels"}
    assert not set(reg["z"]) & {2, 5}
    assert set(reg["z"]) == {0, 1, 3, 4, 6, 7}  # spread: every allowed section used
    assert (reg["y0"] >= 0).all() and (reg["y0"] + 16 <= 48).all()
    assert (reg["x0"] >= 0).all() and (reg["x0"] + 16 <= 48).all()
    # labels match the reference computed on the whole volume (downscale_local_mean > 0.5)
    ref = downscale_local_mean((truth > 0).astype(np.float64), FACTORS) > 0.5
    for r in reg.itertuples(index=False):
        np.testing.assert_array_equal(
            labels[r.tile_id], ref[r.z, r.y0 : r.y0 + 16, r.x0 : r.x0 + 16]
        )


def test_sampling_min_fraction(tmp_path):
    _, truth = volume(shape=(8, 96, 96))
    reg, labels = sampled(truth, min_fraction=0.2, count=6)
    assert all(labels[t].mean() >= 0.2 for t in reg["tile_id"])
    with pytest.raises(
        TesseraInputError,
        match=r"target fraction >= 0.1\); lower count or size, or the target fraction",
    ):
        sampled(np.zeros((8, 96, 96), np.uint8), min_fraction=0.1, max_tries=20)


def test_sampling_takes_as_many_tiles_as_fit_only_when_allowed(tmp_path):
    # Sections of 48 x 48 working pixels hold one non-overlapping tile of 30 (two need 60 along
    # one axis: pigeonhole), so the 6 allowed sections hold 6 tiles whatever the seed.
    _, truth = volume(shape=(8, 96, 96))
    reg, labels = sampled(truth, size=30, count=10, allow_fewer=True)
    assert len(reg) == len(labels) == 6
    assert sorted(reg["z"]) == [0, 1, 3, 4, 6, 7]
    with pytest.raises(TesseraInputError, match="could not place tile 7 of 10"):
        sampled(truth, size=30, count=10)


def job_inputs(tmp_path, raw, truth, *, excluded, spacing=(40, 8, 8)):
    """(label volume, pyramid, QC table) of a sample_tiles job over `raw` and its `truth`."""
    tifffile.imwrite(tmp_path / "raw.tif", raw)
    tifffile.imwrite(tmp_path / "truth.tif", truth)
    ingest_job(tmp_path / "raw.tif", tmp_path / "raw.ome.zarr", fmt="tiff_stack", spacing=spacing)
    pyramid_job(tmp_path / "raw.ome.zarr", tmp_path / "pyr.ome.zarr", levels=1)
    qc = tmp_path / "sections.tsv"
    pd.DataFrame({"z": range(len(raw)), "excluded": excluded}).to_csv(qc, sep="\t", index=False)
    return tmp_path / "truth.tif", tmp_path / "pyr.ome.zarr", qc


def test_sample_tiles_job_names_the_label_file_and_the_settings(tmp_path):
    # A volume too small for the tiles asked for: the one line names the label volume and the
    # config keys that decide; with allow_fewer the job takes what fits.
    raw, truth = volume(shape=(6, 64, 64))
    args = job_inputs(tmp_path, raw, truth, excluded=[False] * 6)
    kw = dict(dataset="d1", target="mito", downsample=2, size=24, count=9, seed=0)
    with pytest.raises(TesseraInputError) as error:
        sample_tiles_job(*args, tmp_path / "tiles", **kw)
    message = str(error.value)
    assert message.startswith(f"{tmp_path / 'truth.tif'}: could not place tile 7 of 9")
    assert "tiles.per_dataset" in message and "tiles.allow_fewer" in message
    assert "\n" not in message and not (tmp_path / "tiles").exists()
    summary = sample_tiles_job(*args, tmp_path / "tiles", **kw, allow_fewer=True)
    assert (summary["tiles"], summary["asked"]) == (6, 9)


@pytest.mark.parametrize(
    "labels, message",
    [
        # every voxel 0: the wrong file, or an export that lost the painting
        (lambda t: np.zeros_like(t), r"label volume has no mito voxels \(every voxel is 0\)"),
        (lambda t: np.ones_like(t), r"label volume has no background voxels"),
        # a uint16 label volume re-saved as int16 wraps its high ids below zero
        (
            lambda t: t.astype(np.int16) - 1,
            r"label volume holds negative values \(lowest -1\); expected 0 for background",
        ),
        # a dtype problem is not a matter of tile settings: no tiles.* hint beside it
        (
            lambda t: t.astype(np.float32),
            r"label volume must hold integers \(0 background\), got float32$",
        ),
    ],
)
def test_sample_tiles_job_refuses_label_volumes_without_both_classes_or_not_labels(
    tmp_path, labels, message
):
    # > 0 is target and 0 background (the README's label volumes); both must be present
    # (common practice: a binary classifier needs examples of both classes).
    raw, truth = volume(shape=(6, 64, 64))
    args = job_inputs(tmp_path, raw, labels(truth), excluded=[False] * 6)
    kw = dict(dataset="d1", target="mito", downsample=2, size=16, count=2, seed=0)
    with pytest.raises(TesseraInputError, match=message):
        sample_tiles_job(*args, tmp_path / "t", **kw)
    assert not (tmp_path / "t").exists()


def test_a_label_volume_is_checked_by_a_job_of_its_own_and_cut_only_as_checked(tmp_path):
    # The check reads the volume whole and records it; the tiles are cut from that volume
    # only. A volume damaged after a run fails the check (which writes nothing), so the job
    # that would clear the earlier tiles never starts; one replaced behind the check's back is
    # refused by sample_tiles itself.
    raw, truth = volume(shape=(6, 64, 64))
    labels, pyramid, qc = job_inputs(tmp_path, raw, truth, excluded=[False] * 6)
    check = tmp_path / "labels_check.json"
    found = check_labels_job(labels, tmp_path / "raw.ome.zarr", check, target="mito")
    assert found["shape"] == [6, 64, 64] and found["target_voxels"] == int((truth > 0).sum())
    kw = dict(dataset="d1", target="mito", downsample=2, size=16, count=2, seed=0)
    assert (
        sample_tiles_job(labels, pyramid, qc, tmp_path / "t", labels_check=check, **kw)["tiles"]
        == 2
    )
    whole = labels.read_bytes()
    labels.write_bytes(whole[: len(whole) // 2])  # cut short in copying
    with pytest.raises(TesseraInputError) as info:
        check_labels_job(labels, tmp_path / "raw.ome.zarr", tmp_path / "again.json", target="mito")
    assert str(info.value).startswith(str(labels)) and "\n" not in str(info.value)
    assert not (tmp_path / "again.json").exists()
    tifffile.imwrite(labels, truth.astype(np.uint8))  # another volume: another dtype
    with pytest.raises(TesseraInputError) as info:
        sample_tiles_job(labels, pyramid, qc, tmp_path / "t2", labels_check=check, **kw)
    assert "the label volume changed since it was checked (shape [6, 64, 64], dtype " in str(
        info.value
    )
    assert not (tmp_path / "t2").exists()


def test_an_instance_volume_must_mark_the_voxels_the_labels_mark(tmp_path):
    # The instance volume gives the true objects of the 3D object scores and the label volume
    # the true pixels: both annotate the same organelles. Connected components of the labels
    # (scipy.ndimage.label) agree exactly; a volume of other objects is refused in one line.
    from scipy import ndimage

    raw, truth = volume(shape=(6, 64, 64))
    labels, _, _ = job_inputs(tmp_path, raw, truth, excluded=[False] * 6)
    instances = tmp_path / "instances.tif"
    tifffile.imwrite(instances, ndimage.label(truth > 0)[0].astype(np.uint16))
    found = check_labels_job(
        labels,
        tmp_path / "raw.ome.zarr",
        tmp_path / "a.json",
        target="mito",
        instances_path=instances,
    )
    assert found["instance_agreement"] == 1.0
    other = np.zeros(truth.shape, np.uint16)
    other[:, 5:25, 5:25] = 1  # one square in every section, mostly where the labels say background
    tifffile.imwrite(instances, other)
    with pytest.raises(TesseraInputError) as info:
        check_labels_job(
            labels,
            tmp_path / "raw.ome.zarr",
            tmp_path / "b.json",
            target="mito",
            instances_path=instances,
        )
    message = str(info.value)
    assert message.startswith(f"{instances}: its objects (> 0, ") and "\n" not in message
    assert f"voxels) and the label volume {labels} (" in message
    assert "target voxels) agree on " in message
    assert "% of the voxels either marks; expected the same organelles (at least 90%)" in message
    assert not (tmp_path / "b.json").exists()
    # the labels' own mask given as instances: one id for all of them; scipy.ndimage.label
    # (26-connectivity) counts the separate objects the message names
    components = ndimage.label(truth > 0, np.ones((3, 3, 3), bool))[1]
    assert components > 1
    tifffile.imwrite(instances, (truth > 0).astype(np.uint8) * 255)
    with pytest.raises(TesseraInputError) as info:
        check_labels_job(
            labels,
            tmp_path / "raw.ome.zarr",
            tmp_path / "c.json",
            target="mito",
            instances_path=instances,
        )
    assert str(info.value) == (
        f"{instances}: it numbers every voxel 255 where the label volume holds {components} "
        "separate objects (26-connected); expected one integer id per object (0 background): "
        "a mask, not an instance volume"
    )
    assert not (tmp_path / "c.json").exists()


def test_only_sections_holding_labels_give_tiles_when_only_those_count_as_annotated(tmp_path):
    # A volume annotated on sections 2 and 3 only, the others left 0. Counted as annotated
    # everywhere (the default), sections turn by turn give tiles, so six tiles reach empty
    # sections and would teach that the organelles there are background; with sections:
    # labelled they all lie on sections 2 and 3.
    raw, truth = volume(shape=(8, 96, 96), centres=[(2.5, 48, 48)])
    truth[[0, 1, 4, 5, 6, 7]] = 0
    args = job_inputs(tmp_path, raw, truth, excluded=[False] * 8)
    kw = dict(dataset="d1", target="mito", downsample=2, size=16, count=8, seed=0)
    sample_tiles_job(*args, tmp_path / "all", **kw)
    every = pd.read_csv(tmp_path / "all" / "tiles.tsv", sep="\t")
    assert sorted(set(every["z"])) == list(range(8))
    summary = sample_tiles_job(*args, tmp_path / "labelled", **kw, sections="labelled")
    only = pd.read_csv(tmp_path / "labelled" / "tiles.tsv", sep="\t")
    assert len(only) == 8 and set(only["z"]) == {2, 3}
    assert summary["excluded_sections"] == [0, 1, 4, 5, 6, 7]


def test_the_label_check_refuses_labelled_sections_no_working_section_holds_whole(tmp_path):
    # Refused by check_labels, a job of its own, so that rule sample_tiles never starts and the
    # dataset's earlier tiles stay. A near-isotropic stack's working level at downsample 2
    # averages pairs of sections; labels on every other section leave no pair whole.
    raw, truth = volume(shape=(8, 96, 96), centres=[(1, 48, 48), (5, 48, 48)])
    truth[0::2] = 0
    labels, pyramid, _ = job_inputs(tmp_path, raw, truth, excluded=[False] * 8, spacing=(8, 8, 8))
    out = tmp_path / "check.json"
    kw = dict(target="mito", pyramid_path=pyramid, sections="labelled")
    with pytest.raises(TesseraInputError) as info:
        check_labels_job(labels, tmp_path / "raw.ome.zarr", out, downsample=2, **kw)
    assert str(info.value) == (
        f"{labels}: with targets.mito.annotations.sections: labelled, no section at downsample 2 "
        "is wholly labelled (4 of 8 sections hold mito voxels): that level averages 2 sections in "
        "z and counts one as annotated only where each of them is labelled; label runs of 2 "
        "consecutive sections starting at a multiple of 2, or use downsample: 1, or set "
        "pyramid.downsample_z: false"
    )
    assert not out.exists()
    # at full resolution every labelled section is a working section of its own
    found = check_labels_job(labels, tmp_path / "raw.ome.zarr", out, downsample=1, **kw)
    assert found["labelled_sections"] == 4


def test_a_long_run_of_sections_without_labels_is_logged_when_every_section_counts(
    tmp_path, caplog
):
    raw, truth = volume(shape=(8, 96, 96), centres=[(1, 48, 48)])
    truth[4:] = 0
    labels, pyramid, _ = job_inputs(tmp_path, raw, truth, excluded=[False] * 8)
    with caplog.at_level(logging.WARNING):
        check_labels_job(
            labels,
            tmp_path / "raw.ome.zarr",
            tmp_path / "check.json",
            target="mito",
            pyramid_path=pyramid,
            downsample=2,
        )
    assert (
        "sections 4 to 7 (4 of 8) hold no mito voxel; every section counts as annotated, so they "
        "teach that whatever lies there is background. If they were not annotated, set "
        "targets.mito.annotations.sections: labelled"
    ) in caplog.text


def test_sparse_labelled_sections_on_a_pyramid_reduced_in_z_are_refused_with_the_reason(tmp_path):
    # A near-isotropic stack's working level at downsample 2 averages pairs of sections (the
    # pyramid reduces z too); labels on every other section leave no pair wholly annotated.
    raw, truth = volume(shape=(8, 96, 96), centres=[(1, 48, 48), (5, 48, 48)])
    truth[0::2] = 0
    args = job_inputs(tmp_path, raw, truth, excluded=[False] * 8, spacing=(8, 8, 8))
    kw = dict(dataset="d1", target="mito", downsample=2, size=16, count=2, seed=0)
    with pytest.raises(TesseraInputError) as info:
        sample_tiles_job(*args, tmp_path / "t", **kw, sections="labelled")
    assert str(info.value) == (
        f"{tmp_path / 'truth.tif'}: every level-1 section averages an excluded level-0 section "
        "(4 of 8 excluded); nothing to sample from: a working-level section averages 2 level-0 "
        "sections, and with annotations.sections: labelled it counts as annotated only when "
        "each of them holds mito voxels; annotate runs of consecutive sections"
    )
    assert not (tmp_path / "t").exists()


def test_sample_tiles_job_says_qc_excluded_every_section(tmp_path):
    # A constant or blank stack is flagged flat throughout: the one line names the QC table
    # and the QC setting, not the tile settings that cannot help.
    raw, truth = volume(shape=(5, 64, 64))
    args = job_inputs(tmp_path, raw, truth, excluded=[True] * 5)
    kw = dict(dataset="d1", target="mito", downsample=2, size=16, count=2, seed=0)
    with pytest.raises(
        TesseraInputError,
        match=r"sections.tsv: section QC excluded every section of dataset d1, so no tile can be "
        r"cut; look at its sections.png, or set qc.exclude_flagged: false",
    ):
        sample_tiles_job(*args, tmp_path / "t", **kw)


# --------------------------------------------------------------------------------------------
# open data


def load_vnc_mitochondria(root):
    files = sorted((root / "mitochondria").glob("*.png"))
    # convert("L"): some of these masks are 1-bit PNGs, which numpy would read as bool
    return np.stack([np.asarray(Image.open(f).convert("L")) for f in files])


def test_vnc_sstem_sampled_fraction_matches_numpy(vnc_sstem):
    # Gerhard et al. 2013 (doi:10.6084/m9.figshare.856713): 20 sections of 1024 x 1024,
    # mitochondria/NN.png with values > 127 marking mitochondria (per its README).
    masks = load_vnc_mitochondria(vnc_sstem)
    assert masks.shape == (20, 1024, 1024)
    keep = list(range(14))
    reg, labels = sample_tiles_from_labels(
        masks,
        dataset="vnc",
        target="mitochondria",
        level=1,
        factors=FACTORS,
        size=128,
        count=28,
        seed=11,
        exclude_z=range(14, 20),
        threshold=127,
    )
    assert set(reg["z"]) == set(keep)
    fractions = []
    for r in reg.itertuples(index=False):
        region = masks[r.z, 2 * r.y0 : 2 * (r.y0 + 128), 2 * r.x0 : 2 * (r.x0 + 128)] > 127
        blocks = region.reshape(128, 2, 128, 2).sum(axis=(1, 3))
        mixed = np.mean((blocks > 0) & (blocks < 4))
        # numpy on the same region: 2 x 2 majority voting can only change blocks that hold
        # both classes, so the fractions differ by at most the share of such blocks
        assert abs(labels[r.tile_id].mean() - region.mean()) <= mixed
        fractions.append(labels[r.tile_id].mean())
    fractions = np.array(fractions)
    # numpy on the whole of sections 0-13: the tile mean estimates it; within 3 standard errors
    whole = np.mean(masks[keep] > 127)
    assert 0 < whole < 0.5
    standard_error = fractions.std(ddof=1) / np.sqrt(len(fractions))
    assert abs(fractions.mean() - whole) <= 3 * standard_error
