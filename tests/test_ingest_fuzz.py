"""Damaged image inputs, generated: each is ingested exactly or refused with one clear line.

For every source format the sheet accepts (config/schemas/datasets.schema.yaml), a small known
volume is written with the format's reference library (tifffile, Pillow, mrcfile, zarr), then
damaged: cut at a random byte, one byte changed, metadata that disagree with the data, colour
pixels, NaN or infinity, an empty file. The property is the one a user relies on: ingest either
gives exactly the volume that was written, or stops with a TesseraInputError of one line that
starts with the damaged file's path, writing nothing. Any other exception fails the test.

Hypothesis draws the damage; runs are derandomized (the same examples every time, so CI is
stable) with few examples per case and no deadline. `refused_or_exact` and the writers take a
format name and a path only, so further readers can join the same property.
"""

import contextlib
import json
import tempfile
import warnings
from pathlib import Path
from typing import NamedTuple

import h5py
import mrcfile
import numpy as np
import pytest
import tifffile
import zarr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image
from tessera.workflow.jobs.ingest import ingest_job

SPACING = (40.0, 8.0, 8.0)
FUZZ = settings(
    max_examples=12,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)


class Written(NamedTuple):
    src: Path  # what the sheet names
    fmt: str
    damaged: Path  # the file the damage goes into
    pixels: tuple | None  # byte range of uncompressed pixels in `damaged`, or None


# the array inside a container format's file
INTERNAL_PATH = {"hdf5": "volumes/raw"}


def _volume(z=5, y=12, x=10, seed=0):
    return np.random.default_rng(seed).integers(0, 256, (z, y, x), dtype=np.uint8)


# --- writers: (folder, volume) -> (path given to ingest, format, file to damage, pixel bytes) ---
# `pixel bytes` is the byte range holding uncompressed pixels: TIFF and MRC carry no checksum
# over them, so a changed pixel byte is a different image, not damage any reader can see; byte
# changes are drawn outside it. PNG (CRC-32 per chunk, PNG spec section 5.3) and zarr's
# compressed chunks are checked where their format allows.


def write_tiff(folder, volume, **kwargs):
    path = folder / "stack.tif"
    tifffile.imwrite(path, volume, photometric="minisblack", **kwargs)
    with tifffile.TiffFile(path) as tif:
        starts = [p.dataoffsets[0] for p in tif.pages]
        pixels = (min(starts), max(starts) + volume[0].nbytes)
    return Written(path, "tiff_stack", path, pixels)


def write_imagej_tiff(folder, volume):
    return write_tiff(folder, volume, imagej=True, metadata={"axes": "ZYX"})


def write_ome_tiff(folder, volume):
    path = folder / "stack.ome.tif"
    tifffile.imwrite(path, volume, ome=True, photometric="minisblack")
    with tifffile.TiffFile(path) as tif:
        starts = [p.dataoffsets[0] for p in tif.pages]
    return Written(path, "tiff_stack", path, (min(starts), max(starts) + volume[0].nbytes))


def write_png_folder(folder, volume):
    src = folder / "slices"
    src.mkdir()
    for z, plane in enumerate(volume):
        Image.fromarray(plane).save(src / f"sec_{z:03d}.png")
    return Written(src, "slice_folder", src / f"sec_{len(volume) // 2:03d}.png", None)


def write_tif_folder(folder, volume):
    src = folder / "slices"
    src.mkdir()
    for z, plane in enumerate(volume):
        tifffile.imwrite(src / f"sec_{z:03d}.tif", plane, photometric="minisblack")
    damaged = src / f"sec_{len(volume) // 2:03d}.tif"
    with tifffile.TiffFile(damaged) as tif:
        start = tif.pages[0].dataoffsets[0]
    return Written(src, "slice_folder", damaged, (start, start + volume[0].nbytes))


def write_mrc(folder, volume):
    path = folder / "stack.mrc"
    if volume.dtype == np.uint8:
        volume = volume.astype(np.int16)  # MRC mode 1; values 0..255 copy exactly
    with mrcfile.new(path) as mrc, warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # mrcfile warns when writing NaN
        mrc.set_data(volume)
    return Written(path, "mrc", path, (1024, 1024 + volume.nbytes))


def write_zarr(folder, volume):
    path = folder / "stack.zarr"
    arr = zarr.create_array(
        store=str(path), shape=volume.shape, chunks=(2, 8, 8), dtype=volume.dtype
    )
    arr[:] = volume
    return Written(path, "zarr", path / "zarr.json", None)


def write_hdf5(folder, volume):
    # contiguous, uncompressed: h5py's default layout, pixels at the dataset's offset
    path = folder / "stack.h5"
    with h5py.File(path, "w") as f:
        start = f.create_dataset(INTERNAL_PATH["hdf5"], data=volume).id.get_offset()
    return Written(path, "hdf5", path, (start, start + volume.nbytes))


WRITERS = {
    "hdf5": write_hdf5,
    "tiff": write_tiff,
    "imagej_tiff": write_imagej_tiff,
    "ome_tiff": write_ome_tiff,
    "png_folder": write_png_folder,
    "tif_folder": write_tif_folder,
    "mrc": write_mrc,
    "zarr": write_zarr,
}


def refused_or_exact(path, fmt, expected):
    """Ingest `path`: it must give exactly `expected` or a one-line TesseraInputError naming it.

    Returns "exact" or "refused". Any other exception propagates and fails the test.
    """
    out = Path(tempfile.mkdtemp()) / "out.ome.zarr"
    try:
        ingest_job(
            path,
            out,
            fmt=fmt,
            internal_path=INTERNAL_PATH.get(fmt),
            spacing=SPACING,
            chunks=(1, 16, 16),
        )
    except TesseraInputError as exc:
        text = str(exc)
        assert "\n" not in text, text
        assert text.startswith(str(path)), text  # names the file (or a file in the folder)
        assert not out.exists() and list(out.parent.iterdir()) == []  # nothing written
        return "refused"
    np.testing.assert_array_equal(open_image(out)[1]["levels"][0][:], expected)
    return "exact"


@contextlib.contextmanager
def _written(kind, volume):
    with tempfile.TemporaryDirectory() as folder:
        yield WRITERS[kind](Path(folder), volume)


# Every reader, undamaged: the harness's own control (the property must hold with "exact").
@pytest.mark.parametrize("kind", sorted(WRITERS))
def test_undamaged_inputs_ingest_exactly(kind):
    volume = _volume()
    with _written(kind, volume) as (src, fmt, _, _):
        assert refused_or_exact(src, fmt, volume) == "exact"


@pytest.mark.parametrize("kind", sorted(WRITERS))
@FUZZ
@given(cut=st.floats(min_value=0.0, max_value=0.999))
def test_truncated_at_any_byte(kind, cut):
    volume = _volume()
    with _written(kind, volume) as (src, fmt, damaged, _):
        data = damaged.read_bytes()
        damaged.write_bytes(data[: int(cut * len(data))])
        refused_or_exact(src, fmt, volume)


@pytest.mark.parametrize("kind", sorted(WRITERS))
@FUZZ
@given(where=st.floats(min_value=0.0, max_value=0.999), xor=st.integers(1, 255))
def test_one_byte_changed(kind, where, xor):
    volume = _volume()
    with _written(kind, volume) as (src, fmt, damaged, pixels):
        data = bytearray(damaged.read_bytes())
        outside = [i for i in range(len(data)) if pixels is None or not pixels[0] <= i < pixels[1]]
        at = outside[int(where * len(outside))]
        data[at] ^= xor
        damaged.write_bytes(bytes(data))
        refused_or_exact(src, fmt, volume)


@pytest.mark.parametrize("kind", sorted(WRITERS))
def test_empty_file_is_refused(kind):
    volume = _volume()
    with _written(kind, volume) as (src, fmt, damaged, _):
        damaged.write_bytes(b"")
        assert refused_or_exact(src, fmt, volume) == "refused"


@pytest.mark.parametrize("kind", sorted(WRITERS))
@FUZZ
@given(z=st.integers(1, 4), y=st.integers(1, 9), x=st.integers(1, 9))
def test_small_stacks_ingest_exactly_and_single_sections_are_refused(kind, z, y, x):
    # A stack of a few sections, however small, comes back exactly. A single section (one
    # TIFF page, a 2D MRC, one slice file) is one line of refusal, never a "volume" one section
    # thick whose objects would have volumes and surfaces.
    volume = _volume(z, y, x, seed=z * 100 + y * 10 + x)
    with _written(kind, volume) as (src, fmt, _, _):
        result = refused_or_exact(src, fmt, volume)
    # tifffile's writer drops axes of length 1 (a (2, 1, 1) array becomes one 2 x 1 page), so a
    # stack 1 pixel wide or high cannot come back page by page: refusing it is right
    thin = kind in ("tiff", "imagej_tiff", "ome_tiff") and min(y, x) == 1
    assert result == ("refused" if z == 1 else "exact") or thin


@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("kind", ["tiff", "tif_folder", "mrc", "zarr", "hdf5"])
def test_float_with_nan_or_infinity_is_refused(kind, value):
    volume = np.random.default_rng(1).normal(100.0, 20.0, (4, 8, 8)).astype(np.float32)
    volume[2, 3, 3] = value
    with _written(kind, volume) as (src, fmt, _, _):
        with pytest.raises(TesseraInputError, match=r"section 2 holds 1 NaN or infinite value"):
            ingest_job(
                src,
                Path(tempfile.mkdtemp()) / "o.ome.zarr",
                fmt=fmt,
                internal_path=INTERNAL_PATH.get(fmt),
                spacing=SPACING,
            )


def _rgb_tiff(folder):
    path = folder / "rgb.tif"
    tifffile.imwrite(path, np.zeros((3, 8, 8, 3), np.uint8), photometric="rgb")
    return path, "tiff_stack", "expected greyscale pages"


def _rgb_png_folder(folder):
    (folder / "s").mkdir()
    for z in range(3):
        Image.fromarray(np.zeros((8, 8, 3), np.uint8)).save(folder / "s" / f"{z}.png")
    return folder / "s", "slice_folder", "expected a greyscale image"


def _rgb_mrc(folder):
    # MRC2014 mode 16: 3 bytes (r, g, b) per voxel. mrcfile does not write it, so the header of
    # an 8-bit file holding the same bytes is edited.
    path = folder / "rgb.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(np.zeros((3, 8, 24), dtype=np.int8))
    with mrcfile.open(path, mode="r+", permissive=True) as mrc:
        mrc.header.mode, mrc.header.nx = 16, 8
    return path, "mrc", "cannot read the MRC2014 header: Unrecognised mode '16'"


def _rgb_zarr(folder):
    path = folder / "rgb.zarr"
    zarr.create_array(store=str(path), shape=(3, 8, 8, 3), chunks=(1, 8, 8, 3), dtype="uint8")
    return path, "zarr", "expected a 3D z, y, x array"


@pytest.mark.parametrize("make", [_rgb_tiff, _rgb_png_folder, _rgb_mrc, _rgb_zarr])
def test_colour_pixels_are_refused(tmp_path, make):
    src, fmt, message = make(tmp_path)
    with pytest.raises(TesseraInputError, match=message):
        ingest_job(src, tmp_path / "o.ome.zarr", fmt=fmt, spacing=SPACING)


# --- metadata that disagree with the data -------------------------------------------------


def _edit_tiff_description(path, old, new):
    with tifffile.TiffFile(path, mode="r+") as tif:
        text = tif.pages[0].description
        assert old in text
        tif.pages[0].tags["ImageDescription"].overwrite(text.replace(old, new))


@FUZZ
@given(stated=st.integers(1, 40))
def test_metadata_stating_another_page_count(stated):
    # The same five pages, described as `stated` pages by each kind of TIFF description.
    volume = _volume()
    for kind, old, new in [
        ("tiff", '"shape": [5,', f'"shape": [{stated},'),
        ("imagej_tiff", "images=5", f"images={stated}"),
        ("ome_tiff", 'SizeC="5"', f'SizeC="{stated}"'),  # tifffile writes the planes as C
    ]:
        with _written(kind, volume) as (src, fmt, _, _):
            _edit_tiff_description(src, old, new)
            result = refused_or_exact(src, fmt, volume)
            assert result == ("exact" if stated == 5 else "refused"), (kind, stated)


@FUZZ
@given(nz=st.integers(1, 12), nx=st.integers(1, 20))
def test_mrc_header_disagreeing_with_the_file_size(nz, nx):
    volume = _volume()
    with _written("mrc", volume) as (src, fmt, _, _):
        with mrcfile.open(src, mode="r+", permissive=True) as mrc:
            mrc.header.nz, mrc.header.nx = nz, nx
        result = refused_or_exact(src, fmt, volume)
        assert result == ("exact" if (nz, nx) == (5, 10) else "refused")


@FUZZ
@given(z=st.integers(1, 5), zarr_format=st.sampled_from([2, 3]))
def test_zarr_metadata_stating_fewer_sections(z, zarr_format):
    # Only fewer: a chunk never stored reads as the fill value (zarr v3 spec, "chunk grid"), so
    # metadata stating more sections than were written cannot be told from a sparse array.
    volume = _volume()
    if zarr_format == 2:
        with tempfile.TemporaryDirectory() as folder:
            src = Path(folder) / "v2.zarr"
            arr = zarr.create_array(
                store=str(src),
                shape=volume.shape,
                chunks=(2, 8, 8),
                dtype="uint8",
                zarr_format=2,
            )
            arr[:] = volume
            doc = json.loads((src / ".zarray").read_text())
            doc["shape"][0] = z
            (src / ".zarray").write_text(json.dumps(doc))
            result = refused_or_exact(src, "zarr", volume)
        assert result == ("exact" if z == 5 else "refused")
        return
    with _written("zarr", volume) as (src, fmt, meta, _):
        doc = json.loads(meta.read_text())
        doc["shape"][0] = z
        meta.write_text(json.dumps(doc))
        result = refused_or_exact(src, fmt, volume)
        assert result == ("exact" if z == 5 else "refused")
