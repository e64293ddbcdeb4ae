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
from tessera.workflow.jobs.ingest import ingest_job

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
