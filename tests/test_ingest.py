"""Ingest: every source format, voxel sizes, 16-bit mapping, metadata, and bad input."""

import json
import os

import mrcfile
import numpy as np
import pytest
import tifffile
import zarr
from ome_zarr_models.v05 import Image
from PIL import Image as PILImage

from tessera.errors import TesseraInputError
from tessera.intensity import estimate_intensity_range, to_uint8
from tessera.io.omezarr import open_image
from tessera.io.stacks import open_stack
from tessera.workflow.jobs.ingest import check_stack_job, ingest_job

SPACING = (40.0, 8.0, 8.0)


@pytest.fixture
def volume():
    return np.random.default_rng(7).integers(0, 256, size=(6, 48, 40), dtype=np.uint8)


def _write_folder(folder, volume, suffix):
    folder.mkdir()
    # Names numbered without padding: natural order must put 10 after 9.
    for z, plane in enumerate(volume):
        path = folder / f"sec{z}{suffix}"
        if suffix == ".png":
            PILImage.fromarray(plane).save(path)
        else:
            tifffile.imwrite(path, plane)


@pytest.mark.parametrize(
    "fmt", ["tiff_stack", "slice_folder_tif", "slice_folder_png", "mrc", "zarr"]
)
def test_every_format_round_trips(tmp_path, volume, fmt):
    if fmt == "tiff_stack":
        src = tmp_path / "stack.tif"
        tifffile.imwrite(src, volume)
    elif fmt.startswith("slice_folder"):
        src = tmp_path / "slices"
        _write_folder(src, volume, ".png" if fmt.endswith("png") else ".tif")
        fmt = "slice_folder"
    elif fmt == "mrc":
        src = tmp_path / "stack.mrc"
        with mrcfile.new(src) as mrc:
            mrc.set_data(volume)
    else:
        src = tmp_path / "stack.zarr"
        arr = zarr.create_array(
            store=str(src), shape=volume.shape, chunks=(2, 16, 16), dtype="uint8"
        )
        arr[:] = volume
    summary = ingest_job(
        src, tmp_path / "out.ome.zarr", fmt=fmt, spacing=SPACING, chunks=(1, 32, 32)
    )
    _, info = open_image(tmp_path / "out.ome.zarr")
    np.testing.assert_array_equal(info["levels"][0][:], volume)
    assert info["spacing"] == SPACING
    mapping = summary["intensity_mapping"]
    # mrcfile stores 8-bit data as MRC mode 6 (uint16); values in 0..255 must copy exactly.
    assert mapping is None or mapping["method"] == "exact"


def test_slice_folder_orders_numbers_naturally(tmp_path):
    volume = np.arange(12, dtype=np.uint8).reshape(12, 1, 1) * np.ones((1, 4, 4), np.uint8)
    _write_folder(tmp_path / "s", volume, ".tif")
    stack = open_stack(tmp_path / "s", "slice_folder")
    assert [int(stack.read(z)[0, 0]) for z in range(12)] == list(range(12))


def test_slice_folder_with_a_jpeg_among_its_sections_is_refused(tmp_path):
    # a section saved as JPEG (lossy; not read as a section) passed as a lost section and came
    # in blank; other files (notes, thumbnails caches) are still no sections
    volume = np.arange(4, dtype=np.uint8).reshape(4, 1, 1) * np.ones((1, 4, 4), np.uint8)
    _write_folder(tmp_path / "s", volume, ".tif")
    (tmp_path / "s" / "notes.txt").write_text("acquired on day 3")
    (tmp_path / "s" / "Thumbs.db").write_bytes(b"\x00")
    assert open_stack(tmp_path / "s", "slice_folder").shape == (4, 4, 4)
    victim = sorted((tmp_path / "s").glob("*.tif"))[2]
    PILImage.fromarray(volume[2]).save(victim.with_suffix(".jpg"))
    victim.unlink()
    with pytest.raises(TesseraInputError) as info:
        open_stack(tmp_path / "s", "slice_folder")
    message = str(info.value)
    assert message.startswith(str(tmp_path / "s")) and "\n" not in message
    assert f"{victim.stem}.jpg: image file(s) of a kind sections are not read from" in message
    assert (
        "beside the sections; expected every section as .tif, .tiff, .png (save it again as "
        "TIFF, or move it out of the folder)" in message
    )


def test_slice_folder_of_one_section_is_told_to_hold_every_section(tmp_path):
    _write_folder(tmp_path / "s", np.zeros((1, 8, 8), np.uint8), ".tif")
    with pytest.raises(TesseraInputError) as info:
        ingest_job(tmp_path / "s", tmp_path / "o.ome.zarr", fmt="slice_folder", spacing=SPACING)
    assert str(info.value).endswith(
        "holds a single section of 8 x 8 pixels; expected a stack of sections (z, y, x): put "
        "every section's file into the folder"
    )


def test_slice_folder_skips_hidden_files(tmp_path):
    # macOS writes a '._<name>' file of metadata beside each file copied to a shared drive
    # (AppleDouble, common practice); it is no section, and before it was refused as a second
    # section 0
    volume = np.arange(3, dtype=np.uint8).reshape(3, 1, 1) * np.ones((1, 4, 4), np.uint8)
    _write_folder(tmp_path / "s", volume, ".tif")
    for name in sorted(os.listdir(tmp_path / "s")):
        (tmp_path / "s" / f"._{name}").write_bytes(b"\x00\x05\x16\x07 not an image")
    (tmp_path / "s" / ".backup_0001.tif").write_bytes(b"")
    stack = open_stack(tmp_path / "s", "slice_folder")
    assert stack.shape == (3, 4, 4)
    assert [int(stack.read(z)[0, 0]) for z in range(3)] == [0, 1, 2]


def test_metadata_validates_against_ngff_reference(tmp_path, volume):
    # Reference implementation of the OME-Zarr (NGFF) 0.5 spec: the ome-zarr-models package.
    tifffile.imwrite(tmp_path / "s.tif", volume)
    ingest_job(tmp_path / "s.tif", tmp_path / "o.ome.zarr", fmt="tiff_stack", spacing=SPACING)
    image = Image.from_zarr(zarr.open_group(str(tmp_path / "o.ome.zarr"), mode="r"))
    ms = image.ome_attributes.multiscales[0]
    assert [a.name for a in ms.axes] == ["z", "y", "x"]
    assert [a.unit for a in ms.axes] == ["nanometer"] * 3
    assert list(ms.datasets[0].coordinateTransformations[0].scale) == list(SPACING)
    meta = json.loads((tmp_path / "o.ome.zarr" / "zarr.json").read_text())
    assert meta["zarr_format"] == 3 and meta["attributes"]["ome"]["version"] == "0.5"


def test_mrc_voxel_size_round_trips_through_header(tmp_path, volume):
    # mrcfile (the MRC2014 reference library) stores voxel size in ångström, ordered x, y, z.
    src = tmp_path / "h.mrc"
    with mrcfile.new(src) as mrc:
        mrc.set_data(volume)
        mrc.voxel_size = (46.0, 46.0, 500.0)  # x, y, z in Å = 4.6, 4.6, 50 nm
    ingest_job(src, tmp_path / "o.ome.zarr", fmt="mrc")
    _, info = open_image(tmp_path / "o.ome.zarr")
    assert info["spacing"] == pytest.approx((50.0, 4.6, 4.6))
    # A sheet value wins over the header, axis by axis.
    ingest_job(src, tmp_path / "p.ome.zarr", fmt="mrc", spacing=(45.0, None, None))
    assert open_image(tmp_path / "p.ome.zarr")[1]["spacing"] == pytest.approx((45.0, 4.6, 4.6))


def _mode0_mrc(path, grey, *, stamp, flags):
    """uint8 grey values stored as MRC mode 0 bytes, with a writer's header words (stamp at bytes
    152-155, flags at 156-159, in the header's byte order) as given."""
    with mrcfile.new(path) as mrc:
        mrc.set_data(grey.view(np.int8))
        extra = bytearray(bytes(mrc.header.extra2))
        order = mrc.header.nx.dtype
        extra[40:48] = np.array([stamp, flags], dtype=order).tobytes()
        mrc.header.extra2 = bytes(extra)
    return path


@pytest.mark.parametrize(
    ("stamp", "flags", "unsigned"),
    [
        # common practice (from memory): a writer's stamp 1146047817 in bytes 152-155, and bit 0
        # of its flags set when bytes are signed; without the flag its mode-0 bytes are unsigned
        (1146047817, 0, True),
        (1146047817, 1, False),
        # no stamp: MRC2014's own definition, mode 0 = signed 8-bit integers
        (0, 0, False),
    ],
)
def test_mrc_mode0_bytes_are_read_as_the_writer_stamp_marks_them(tmp_path, stamp, flags, unsigned):
    grey = np.random.default_rng(5).integers(0, 256, (3, 16, 16), dtype=np.uint8)
    src = _mode0_mrc(tmp_path / "b.mrc", grey, stamp=stamp, flags=flags)
    stack = open_stack(src, "mrc")
    assert stack.dtype == (np.uint8 if unsigned else np.int8)
    expected = grey if unsigned else grey.view(np.int8)
    assert np.array_equal(np.stack([stack.read(z) for z in range(3)]), expected)
    stack.close()
    if unsigned:  # ingest copies 8-bit grey values exactly
        ingest_job(src, tmp_path / "o.ome.zarr", fmt="mrc", spacing=SPACING)
        assert np.array_equal(open_image(tmp_path / "o.ome.zarr")[1]["levels"][0][:], grey)


def test_sixteen_bit_mapped_by_recorded_percentiles(tmp_path):
    rng = np.random.default_rng(3)
    volume = rng.normal(20000, 3000, size=(8, 64, 64)).clip(0, 65535).astype(np.uint16)
    tifffile.imwrite(tmp_path / "w.tif", volume)
    summary = ingest_job(
        tmp_path / "w.tif",
        tmp_path / "o.ome.zarr",
        fmt="tiff_stack",
        spacing=SPACING,
        percentiles=(1, 99),
    )
    mapping = summary["intensity_mapping"]
    assert mapping["method"] == "percentile stretch"
    # The stack is small enough to be sampled completely, so the range equals numpy's percentiles.
    low, high = np.percentile(volume.astype(np.float64), (1, 99))
    assert mapping["low"] == pytest.approx(low) and mapping["high"] == pytest.approx(high)
    assert mapping["source_dtype"] == "uint16"
    group, info = open_image(tmp_path / "o.ome.zarr")
    assert info["extra"]["intensity_mapping"] == mapping
    stored = info["levels"][0][:]
    assert stored.dtype == np.uint8
    np.testing.assert_array_equal(stored, to_uint8(volume, low, high))
    # About 1 % of pixels saturate at each end, by construction of the percentiles.
    assert np.mean(stored == 0) == pytest.approx(0.01, abs=0.005)
    assert np.mean(stored == 255) == pytest.approx(0.01, abs=0.005)


def test_intensity_range_is_robust_and_extremes_are_exact():
    class Ramp:
        shape = (4, 1000, 1000)
        dtype = np.dtype(np.uint16)

        def read(self, z):
            plane = np.full(self.shape[1:], z * 100, dtype=np.uint16)
            plane[-1, -1] = 60000  # one hot pixel: in the extremes, not in the robust range
            return plane

    stats = estimate_intensity_range(Ramp(), percentiles=(0, 99), max_samples=10_000)
    assert (stats["low"], stats["high"]) == (0.0, 300.0)
    assert (stats["min"], stats["max"]) == (0.0, 60000.0)


def test_no_partial_store_when_ingest_fails(tmp_path):
    folder = tmp_path / "bad"
    folder.mkdir()
    tifffile.imwrite(folder / "0.tif", np.zeros((8, 8), np.uint8))
    tifffile.imwrite(folder / "1.tif", np.zeros((8, 9), np.uint8))
    out = tmp_path / "o.ome.zarr"
    with pytest.raises(
        TesseraInputError,
        match=r"1\.tif: section has shape \(8, 9\), expected \(8, 8\) like 0\.tif",
    ):
        ingest_job(folder, out, fmt="slice_folder", spacing=SPACING)
    assert os.listdir(tmp_path) == ["bad"]


def test_previous_output_survives_a_failed_rerun(tmp_path, volume):
    tifffile.imwrite(tmp_path / "s.tif", volume)
    out = tmp_path / "o.ome.zarr"
    ingest_job(tmp_path / "s.tif", out, fmt="tiff_stack", spacing=SPACING)
    with pytest.raises(TesseraInputError, match="along y must be > 0"):
        ingest_job(tmp_path / "s.tif", out, fmt="tiff_stack", spacing=(40, -8, 8))
    np.testing.assert_array_equal(open_image(out)[1]["levels"][0][:], volume)


@pytest.mark.parametrize(
    ("make", "fmt", "spacing", "message"),
    [
        (None, "tiff_stack", SPACING, "not found"),
        ("text", "tiff_stack", SPACING, "cannot read as TIFF"),
        ("tif", "jpeg_stack", SPACING, "unknown format 'jpeg_stack'"),
        ("tif", "tiff_stack", (0, 8, 8), "along z must be > 0"),
        (
            "tif",
            "tiff_stack",
            (40, None, 8),
            "along y is blank in the sheet and the file header has none",
        ),
        ("empty_folder", "slice_folder", SPACING, r"no section images \(.*\) in the folder"),
        ("rgb", "tiff_stack", SPACING, "expected greyscale pages"),
    ],
)
def test_bad_input_is_one_clear_error_and_writes_nothing(tmp_path, make, fmt, spacing, message):
    src = tmp_path / "in.tif"
    if make == "text":
        src.write_text("this is not an image")
    elif make == "tif":
        tifffile.imwrite(src, np.zeros((2, 8, 8), np.uint8))
    elif make == "empty_folder":
        src = tmp_path / "folder"
        src.mkdir()
    elif make == "rgb":
        tifffile.imwrite(src, np.zeros((8, 8, 3), np.uint8), photometric="rgb")
    before = sorted(os.listdir(tmp_path))
    with pytest.raises(TesseraInputError, match=message) as info:
        ingest_job(src, tmp_path / "o.ome.zarr", fmt=fmt, spacing=spacing)
    assert str(src) in str(info.value)  # the message names the file
    assert sorted(os.listdir(tmp_path)) == before
    # the stack check, run before ingest, refuses the same stack with the same line
    with pytest.raises(TesseraInputError, match=message) as info:
        check_stack_job(src, tmp_path / "stack_check.json", fmt=fmt, spacing=spacing)
    assert str(src) in str(info.value)
    assert sorted(os.listdir(tmp_path)) == before


def test_the_stack_check_records_the_stack_and_ingest_converts_only_that_stack(tmp_path):
    src = tmp_path / "in.tif"
    stack = np.arange(3 * 8 * 8, dtype=np.uint16).reshape(3, 8, 8)
    tifffile.imwrite(src, stack, photometric="minisblack")
    check = tmp_path / "stack_check.json"
    found = check_stack_job(src, check, fmt="tiff_stack", spacing=(40, 8, 8))
    # what was written: 3 pages of 8 x 8, uint16, at the sheet's voxel size
    assert found["shape"] == [3, 8, 8] and found["dtype"] == "uint16"
    assert found["spacing"] == [40.0, 8.0, 8.0]
    assert found.pop("sections_read") == 0  # no earlier image: the pixels are left to ingest
    assert json.loads(check.read_text())["stack"] == found
    ingest_job(src, tmp_path / "o.ome.zarr", fmt="tiff_stack", spacing=(40, 8, 8), checked=check)
    assert open_image(tmp_path / "o.ome.zarr")[1]["levels"][0].shape == (3, 8, 8)
    # a stack replaced after its check (here one section fewer) is not converted
    tifffile.imwrite(src, stack[:2], photometric="minisblack")
    with pytest.raises(TesseraInputError, match="not the one rule check_stack checked"):
        ingest_job(
            src, tmp_path / "p.ome.zarr", fmt="tiff_stack", spacing=(40, 8, 8), checked=check
        )
    assert not (tmp_path / "p.ome.zarr").exists()


def test_real_sstem_stack_ingests_with_its_voxel_size(tmp_path, vnc_sstem):
    # ../shared/data/vnc-sstem: 20 sections of 1024 x 1024, 4.6 x 4.6 nm pixels, ~50 nm sections
    # (its SOURCE-README; Gerhard et al. 2013).
    out = tmp_path / "vnc.ome.zarr"
    summary = ingest_job(vnc_sstem / "raw", out, fmt="slice_folder", spacing=(50.0, 4.6, 4.6))
    assert summary["shape"] == [20, 1024, 1024]
    group, info = open_image(out)
    assert info["spacing"] == (50.0, 4.6, 4.6)
    np.testing.assert_array_equal(
        info["levels"][0][7], tifffile.imread(vnc_sstem / "raw" / "07.tif")
    )
    Image.from_zarr(group)
