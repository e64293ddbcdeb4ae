"""Stacks inside container files (HDF5, zarr v2/v3, N5): round trips, voxel sizes, bad input.

Files are written here with the formats' own libraries (h5py, zarr) and, for N5, byte by byte
from the N5 format description (github.com/saalfeldlab/n5, README "file-system specification":
attributes.json with dimensions/blockSize/dataType/compression listed x first; one file per
block at <dataset>/<x>/<y>/<z> with a big-endian header of uint16 mode, uint16 number of
dimensions, uint32 block size per dimension, then the elements big-endian, x fastest; from
memory). The ingested volume is compared with the array written.
"""

import gzip
import json
import struct
import zlib

import h5py
import numcodecs
import numpy as np
import pytest
import zarr

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image
from tessera.io.stacks import open_stack
from tessera.workflow.jobs.ingest import ingest_job

KINDS = ["hdf5", "zarr_v2", "zarr_v3", "zarr_plain", "n5"]


def _write_n5(container, name, array, *, block, attrs=None, compression="gzip"):
    """An N5 dataset as its format description lays it out (see the module docs)."""
    folder = container.joinpath(*name.split("/"))
    folder.mkdir(parents=True)
    (container / "attributes.json").write_text(json.dumps({"n5": "2.5.0"}))
    n5_type = {"u": "uint", "i": "int", "f": "float"}[array.dtype.kind] + str(8 * array.itemsize)
    meta = {
        "dimensions": list(array.shape[::-1]),
        "blockSize": list(block[::-1]),
        "dataType": n5_type,
        "compression": {"type": compression},
    }
    (folder / "attributes.json").write_text(json.dumps(meta | (attrs or {})))
    if array.ndim != 3:
        return folder  # refused from its attributes; no blocks needed
    grid = [range(0, s, b) for s, b in zip(array.shape, block, strict=True)]
    for z0 in grid[0]:
        for y0 in grid[1]:
            for x0 in grid[2]:
                part = array[z0 : z0 + block[0], y0 : y0 + block[1], x0 : x0 + block[2]]
                header = struct.pack(">HH", 0, 3) + struct.pack(">3I", *part.shape[::-1])
                body = part.astype(array.dtype.newbyteorder(">")).tobytes()  # C order = x fastest
                body = gzip.compress(body) if compression == "gzip" else body
                where = folder / str(x0 // block[2]) / str(y0 // block[1])
                where.mkdir(parents=True, exist_ok=True)
                (where / str(z0 // block[0])).write_bytes(header + body)
    return folder


def _write(kind, tmp_path, array, *, attrs=None, chunks=(2, 8, 8)):
    """Write `array` as `kind`; return (path, format, internal_path)."""
    attrs = attrs or {}
    if kind == "hdf5":
        path = tmp_path / "stack.h5"
        packed = {"chunks": chunks, "compression": "gzip"} if array.size else {}  # h5py: no
        with h5py.File(path, "w") as f:  # chunks larger than an empty dataset
            ds = f.create_dataset("volumes/raw", data=array, **packed)
            ds.attrs.update(attrs)
        return path, "hdf5", "volumes/raw"
    if kind == "n5":
        path = tmp_path / "stack.n5"
        _write_n5(path, "volumes/raw", array, block=chunks, attrs=attrs)
        return path, "n5", "volumes/raw"
    version = 3 if kind == "zarr_v3" else 2
    path = tmp_path / "stack.zarr"
    if kind == "zarr_plain":
        arr = zarr.create_array(
            store=str(path), shape=array.shape, chunks=chunks, dtype=array.dtype, zarr_format=2
        )
        inner = None
    else:
        group = zarr.open_group(str(path), mode="w", zarr_format=version)
        arr = group.create_array("volumes/raw", shape=array.shape, chunks=chunks, dtype=array.dtype)
        inner = "volumes/raw"
    arr[:] = array
    arr.attrs.update(attrs)
    return path, "zarr", inner


@pytest.fixture
def volume():
    return np.random.default_rng(11).integers(0, 256, size=(5, 20, 18), dtype=np.uint8)


@pytest.mark.parametrize("kind", KINDS)
def test_containers_ingest_to_the_array_written(tmp_path, volume, kind):
    path, fmt, inner = _write(kind, tmp_path, volume)
    summary = ingest_job(
        path,
        tmp_path / "out.ome.zarr",
        fmt=fmt,
        internal_path=inner,
        spacing=(30.0, 4.0, 4.0),
        chunks=(1, 16, 16),
    )
    _, info = open_image(tmp_path / "out.ome.zarr")
    np.testing.assert_array_equal(info["levels"][0][:], volume)  # uint8 data are copied as is
    assert summary["intensity_mapping"] is None and info["spacing"] == (30.0, 4.0, 4.0)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("dtype", [">u2", "<i2", "float32", "float64"])
def test_sections_read_back_equal_to_the_array_written(tmp_path, kind, dtype):
    rng = np.random.default_rng(3)
    array = (rng.normal(size=(3, 11, 13)) * 1000).astype(dtype)
    path, fmt, inner = _write(kind, tmp_path, array, chunks=(2, 4, 8))
    stack = open_stack(path, fmt, internal_path=inner)
    try:
        assert stack.shape == array.shape and stack.dtype == np.dtype(dtype).newbyteorder("=")
        np.testing.assert_array_equal(np.stack([stack.read(z) for z in range(3)]), array)
    finally:
        stack.close()


# Attribute conventions (common practice, from memory): `resolution` in nm, z, y, x in HDF5 and
# zarr volumes (as open segmentation-benchmark volumes store it) but x, y, z in N5 (as N5 tools
# write it); `pixelResolution` = {"dimensions": [x, y, z], "unit": ...} in N5; `element_size_um`
# in µm, z, y, x (as common image-analysis tools write HDF5).
@pytest.mark.parametrize(
    ("kind", "attrs"),
    [
        ("hdf5", {"resolution": [30, 4, 5]}),
        ("hdf5", {"element_size_um": [0.03, 0.004, 0.005]}),
        ("zarr_v2", {"resolution": [30, 4, 5]}),
        ("zarr_plain", {"element_size_um": [0.03, 0.004, 0.005]}),
        ("n5", {"resolution": [5, 4, 30]}),
        ("n5", {"pixelResolution": {"dimensions": [0.005, 0.004, 0.03], "unit": "um"}}),
        (
            "n5",
            {"pixelResolution": {"dimensions": [5, 4, 30], "unit": "nm"}, "resolution": [5, 4, 30]},
        ),
    ],
)
def test_voxel_size_comes_from_the_attributes(tmp_path, volume, kind, attrs):
    path, fmt, inner = _write(kind, tmp_path, volume, attrs=attrs)
    out = tmp_path / "out.ome.zarr"
    ingest_job(path, out, fmt=fmt, internal_path=inner, spacing=(None, 4.0, None))
    np.testing.assert_allclose(open_image(out)[1]["spacing"], (30.0, 4.0, 5.0), rtol=1e-9)


def test_sheet_fills_the_voxel_size_when_the_attributes_have_none(tmp_path, volume):
    path, fmt, inner = _write("hdf5", tmp_path, volume)
    out = tmp_path / "out.ome.zarr"
    ingest_job(path, out, fmt=fmt, internal_path=inner, spacing=(50.0, 6.0, 6.0))
    assert open_image(out)[1]["spacing"] == (50.0, 6.0, 6.0)
    with pytest.raises(TesseraInputError, match="voxel size along z is blank in the sheet"):
        ingest_job(path, tmp_path / "o2.ome.zarr", fmt=fmt, internal_path=inner)


@pytest.mark.parametrize(
    ("attrs", "spacing", "message"),
    [
        (
            {"resolution": [40, 4, 4]},
            (30.0, None, None),
            r"internal_path volumes/raw: attribute resolution gives voxel size 40 nm along z, "
            r"the sheet's voxel_z_nm says 30",
        ),
        (
            {"resolution": [40, 4]},
            (None, None, None),
            r"internal_path volumes/raw: attribute resolution = \[40, 4\] is unusable: expected 3 "
            r"finite numbers > 0",
        ),
        (
            {"resolution": [40, 0, 4]},
            (40.0, 4.0, 4.0),
            r"attribute resolution = \[40, 0, 4\] is unusable",
        ),
        (
            {"pixelResolution": {"dimensions": [4, 4, 40], "unit": "furlong"}},
            (None, None, None),
            r"attribute pixelResolution = .* is unusable: expected \{'dimensions'",
        ),
        (
            {"resolution": [40, 4, 4], "element_size_um": [0.05, 0.004, 0.004]},
            (None, None, None),
            r"attributes resolution and element_size_um disagree on the voxel size: "
            r"\(40, 4, 4\) vs \(50, 4, 4\) nm",
        ),
        (
            # µm written where nm are expected: 0.04 nm sections are no EM voxel size (below an
            # atom's size, common practice)
            {"resolution": [0.04, 0.008, 0.008]},
            (None, None, None),
            r"voxel size along z is 0.04 nm, outside 0.1-100000 nm \(a size in another unit",
        ),
    ],
)
def test_bad_or_disagreeing_voxel_attributes_are_one_line(
    tmp_path, volume, attrs, spacing, message
):
    kind = "n5" if "pixelResolution" in attrs else "hdf5"  # HDF5 attributes hold no mappings
    path, fmt, inner = _write(kind, tmp_path, volume, attrs=attrs)
    out = tmp_path / "out.ome.zarr"
    with pytest.raises(TesseraInputError, match=message) as info:
        ingest_job(path, out, fmt=fmt, internal_path=inner, spacing=spacing)
    assert str(path) in str(info.value) and "\n" not in str(info.value)
    assert not out.exists()


# --------------------------------------------------------------------------------------------
# damaged or unsuitable arrays: one line naming the file and the array, nothing written


def _refused(tmp_path, path, fmt, inner, message):
    out = tmp_path / "out.ome.zarr"
    with pytest.raises(TesseraInputError, match=message) as info:
        ingest_job(path, out, fmt=fmt, internal_path=inner, spacing=(30.0, 4.0, 4.0))
    text = str(info.value)
    assert str(path) in text and "\n" not in text
    assert not out.exists() and not list(tmp_path.glob("out.ome.zarr*"))
    return text


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize(
    ("array", "message"),
    [
        (np.zeros((4, 5), np.uint8), r"expected a 3D z, y, x array, got shape \(4, 5\)"),
        (
            np.zeros((2, 2, 4, 5), np.uint8),
            r"expected a 3D z, y, x array, got shape \(2, 2, 4, 5\)",
        ),
        (np.zeros((0, 4, 5), np.uint8), r"the array is empty \(shape \(0, 4, 5\)\)"),
        (
            np.zeros((2, 4, 5), np.complex64),
            "expected integer or float grey values, got dtype complex64",
        ),
        (np.zeros((2, 4, 5), bool), "expected integer or float grey values, got dtype bool"),
    ],
)
def test_unsuitable_arrays_are_refused(tmp_path, kind, array, message):
    if kind == "n5" and array.dtype.kind not in "uif":
        pytest.skip("N5 has no complex or boolean dataType")  # N5 format description
    chunks = tuple(max(1, min(2, n)) for n in array.shape)
    path, fmt, inner = _write(kind, tmp_path, array, chunks=chunks)
    text = _refused(tmp_path, path, fmt, inner, message)
    if inner:
        assert "internal_path volumes/raw" in text


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_nan_or_infinite_float_values_are_refused(tmp_path, kind, bad):
    array = np.ones((4, 6, 6), np.float32)
    array[3, 5, 1] = bad
    path, fmt, inner = _write(kind, tmp_path, array, chunks=(2, 3, 3))
    text = _refused(tmp_path, path, fmt, inner, "section 3")
    assert "section 3 holds 1 NaN or infinite values; expected finite grey values" in text
    if inner:
        assert f"internal_path {inner}: section 3" in text


@pytest.mark.parametrize("kind", ["hdf5", "zarr_v2", "zarr_v3", "n5"])
def test_missing_internal_path_is_refused(tmp_path, volume, kind):
    path, fmt, _ = _write(kind, tmp_path, volume)
    text = _refused(tmp_path, path, fmt, "volumes/rw", "volumes/rw")
    wanted = {
        "hdf5": "internal_path: no 'volumes/rw' in the file (volumes holds raw)",
        "n5": "internal_path: no N5 dataset 'volumes/rw' in the container",
    }.get(kind, "no zarr array at internal_path 'volumes/rw'")
    assert wanted in text


@pytest.mark.parametrize(
    ("version", "attrs", "says"),
    [
        # OME-Zarr 0.4 keeps "multiscales" at the top of a zarr v2 group's attributes; 0.5 moved
        # it under "ome" in a zarr v3 group (OME-NGFF 0.4 and 0.5 specifications)
        (
            2,
            {"multiscales": [{"datasets": [{"path": "volumes/raw"}]}]},
            "an OME-Zarr image of version 0.4 or older (zarr v2); only 0.5 images are read whole",
        ),
        (3, {}, "a zarr v3 group, not an OME-Zarr 0.5 image"),
        (2, {}, "a zarr v2 group, not an OME-Zarr 0.5 image"),
    ],
)
def test_a_zarr_group_without_internal_path_names_its_arrays(
    tmp_path, volume, version, attrs, says
):
    # Before, a v3 group said only that OME-Zarr metadata were missing, and a v2 group that
    # no v3 group was found: neither named the column that picks the array.
    path, fmt, inner = _write("zarr_v3" if version == 3 else "zarr_v2", tmp_path, volume)
    zarr.open_group(str(path), mode="r+").attrs.update(attrs)
    text = _refused(tmp_path, path, fmt, None, "set column internal_path to the array to read")
    assert f"{says}; set column internal_path to the array to read (it holds the arrays " in text
    assert text.endswith("volumes/raw)")
    ingest_job(path, tmp_path / "out.ome.zarr", fmt=fmt, internal_path=inner, spacing=(30, 4, 4))


def test_hdf5_internal_path_to_a_group_is_refused(tmp_path, volume):
    path, fmt, _ = _write("hdf5", tmp_path, volume)
    text = _refused(tmp_path, path, fmt, "volumes", "internal_path volumes")
    assert "expected a dataset, found a group holding raw" in text


@pytest.mark.parametrize("fmt", ["hdf5", "n5"])
def test_internal_path_is_required_for_hdf5_and_n5(tmp_path, volume, fmt):
    path, _, _ = _write(fmt, tmp_path, volume)
    text = _refused(tmp_path, path, fmt, None, fmt)
    assert f"format {fmt} needs internal_path, the array's path inside the file" in text


def test_internal_path_with_dotdot_is_refused(tmp_path, volume):
    path, fmt, _ = _write("n5", tmp_path, volume)
    text = _refused(tmp_path, path, fmt, "../stack.n5/volumes/raw", "internal_path")
    assert "expected the array's path inside the file, e.g. volumes/raw (no '..' steps)" in text


def _delete_one_chunk(kind, path):
    if kind == "n5":
        (path / "volumes" / "raw" / "1" / "0" / "2").unlink()  # x=1, y=0, z=2: sections 4..
    elif kind == "zarr_v3":
        (path / "volumes" / "raw" / "c" / "2" / "0" / "1").unlink()
    elif kind == "zarr_v2":
        (path / "volumes" / "raw" / "2.0.1").unlink()
    else:
        (path / "2.0.1").unlink()


@pytest.mark.parametrize("kind", ["zarr_v2", "zarr_v3", "zarr_plain", "n5"])
def test_a_missing_chunk_is_refused_not_read_as_fill_value(tmp_path, volume, kind):
    path, fmt, inner = _write(kind, tmp_path, volume)  # chunks (2, 8, 8): z row 2 = section 4
    _delete_one_chunk(kind, path)
    text = _refused(tmp_path, path, fmt, inner, "section 4: chunk")
    assert "is missing from the store (it would read as fill value, not data)" in text
    assert "copy the array again or restore the chunk" in text
    assert "set ingest.missing_chunks: fill_value in config/config.yaml" in text
    if inner:
        assert f"internal_path {inner}: section 4" in text


@pytest.mark.parametrize("kind", ["zarr_v2", "zarr_v3", "zarr_plain", "n5"])
def test_missing_chunks_read_as_fill_value_when_allowed(tmp_path, volume, kind):
    path, fmt, inner = _write(kind, tmp_path, volume)
    _delete_one_chunk(kind, path)  # z 4, y 0..7, x 8..15
    out = tmp_path / "out.ome.zarr"
    ingest_job(
        path,
        out,
        fmt=fmt,
        internal_path=inner,
        spacing=(30.0, 4.0, 4.0),
        missing_chunks="fill_value",
    )
    expected = volume.copy()
    expected[4:6, 0:8, 8:16] = 0  # zarr's default fill value for integers; N5: empty blocks
    meta, info = open_image(out)
    np.testing.assert_array_equal(info["levels"][0][:], expected)
    assert zarr.open_group(str(out), mode="r").attrs["tessera"]["source"][
        "sections_with_missing_chunks"
    ] == [4]


def test_a_damaged_chunk_is_refused_even_when_missing_ones_are_allowed(tmp_path, volume):
    path, fmt, inner = _write("zarr_v2", tmp_path, volume)  # blosc chunks: truncation is seen
    (path / "volumes" / "raw" / "1.0.0").unlink()
    chunk = path / "volumes" / "raw" / "1.0.1"
    chunk.write_bytes(chunk.read_bytes()[:20])
    out = tmp_path / "out.ome.zarr"
    with pytest.raises(TesseraInputError, match="section 2: chunk '1.0.1' is truncated"):
        ingest_job(
            path,
            out,
            fmt=fmt,
            internal_path=inner,
            spacing=(30.0, 4.0, 4.0),
            missing_chunks="fill_value",
        )
    assert not out.exists()


def test_an_unwritten_hdf5_chunk_is_refused(tmp_path, volume):
    path = tmp_path / "stack.h5"
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("raw", shape=volume.shape, chunks=(2, 8, 8), dtype=np.uint8)
        ds[:4] = volume[:4]  # sections 4.. never written: they would read as fill value 0
    text = _refused(tmp_path, path, "hdf5", "raw", "internal_path raw")
    assert "section 4: chunk at offset (4, 0, 0) is missing from the store" in text


@pytest.mark.parametrize("kind", ["hdf5", "zarr_v2", "zarr_v3", "zarr_plain", "n5"])
def test_a_truncated_chunk_is_refused(tmp_path, volume, kind):
    path, fmt, inner = _write(kind, tmp_path, volume)
    if kind == "hdf5":  # overwrite the middle of the compressed chunk holding section 2
        with h5py.File(path, "r") as f:
            info = f["volumes/raw"].id.get_chunk_info_by_coord((2, 8, 0))
        with open(path, "r+b") as fh:
            fh.seek(info.byte_offset + 4)
            fh.write(b"\xff" * (info.size - 8))
    else:
        chunk = {
            "n5": path / "volumes" / "raw" / "0" / "1" / "1",
            "zarr_v3": path / "volumes" / "raw" / "c" / "1" / "1" / "0",
            "zarr_v2": path / "volumes" / "raw" / "1.1.0",
            "zarr_plain": path / "1.1.0",
        }[kind]
        chunk.write_bytes(chunk.read_bytes()[:20])
    text = _refused(tmp_path, path, fmt, inner, "section 2")
    if kind == "zarr_v2":  # a v2 array made through a group is blosc-compressed here
        meta = zarr.open_array(str(path), path=inner, mode="r").metadata
        assert isinstance(meta.compressor, numcodecs.Blosc)
        assert "section 2: chunk '1.1.0' is truncated: its blosc header states" in text
        assert "bytes, the file has 20; copy the array again or restore the chunk" in text
    else:  # the decompressor (zlib, zstd, HDF5's deflate filter) notices the damage
        assert "section 2 cannot be read (truncated or damaged chunk?)" in text


def test_hdf5_with_a_damaged_chunk_index_is_refused(tmp_path, volume):
    # The chunks of a dataset are indexed by a version 1 B-tree whose nodes start with the
    # signature "TREE" and a node type, 1 for chunk indexes (HDF5 File Format Specification,
    # "Version 1 B-trees"). One changed signature byte: h5py raises RuntimeError wherever the
    # index is walked (the stored-extent check on opening, the chunk check of a section).
    path, fmt, inner = _write("hdf5", tmp_path, volume)
    data = bytearray(path.read_bytes())
    at = next(i for i in range(len(data) - 4) if data[i : i + 4] == b"TREE" and data[i + 4] == 1)
    data[at] ^= 0x01
    path.write_bytes(bytes(data))
    _refused(tmp_path, path, fmt, inner, "wrong B-tree signature")


@pytest.mark.parametrize("text", ["7", "[1, 2]"])
def test_zarr_attributes_that_are_not_an_object_are_refused(tmp_path, volume, text):
    # .zattrs must hold a JSON object (zarr v2 spec); zarr opens the array anyway and its
    # attribute mapping then raises TypeError. A changed byte can turn "{}" into "7".
    path, fmt, inner = _write("zarr_plain", tmp_path, volume)
    (path / ".zattrs").write_text(text)
    _refused(tmp_path, path, fmt, inner, "the array's attributes are .* expected a JSON object")


def test_n5_dimensions_stating_fewer_sections_than_written_are_refused(tmp_path, volume):
    # One changed digit in attributes.json ("dimensions": [18, 20, 5] -> [18, 20, 4]): the
    # blocks of section 4 lie beyond the grid and would be ignored, a section silently lost.
    path, fmt, inner = _write("n5", tmp_path, volume)
    meta_file = path / "volumes" / "raw" / "attributes.json"
    meta = json.loads(meta_file.read_text())
    meta["dimensions"][2] = 4
    meta_file.write_text(json.dumps(meta))
    text = _refused(tmp_path, path, fmt, inner, "attributes.json states less than was written")
    assert "block file 0/0/2 lies outside the block grid 3/3/2 (x/y/z)" in text


def test_n5_gzip_blocks_are_not_read_as_raw_when_compression_is_lost(tmp_path, volume):
    # A changed byte in the key "compression" leaves a dataset without one, which N5 reads as
    # raw; the gzip bytes of a block must not become pixels then.
    path, fmt, inner = _write("n5", tmp_path, volume)
    meta_file = path / "volumes" / "raw" / "attributes.json"
    meta_file.write_text(meta_file.read_text().replace('"compression"', '"bompression"'))
    text = _refused(tmp_path, path, fmt, inner, "section 0 cannot be read")
    assert "bytes of elements, expected 128" in text


@pytest.mark.parametrize(
    ("chunks", "message"),
    [
        (None, r"the dataset stores 1800 bytes, its shape \(4, 20, 18\) of uint8 needs 1440"),
        ((2, 8, 8), r"a chunk is stored at offset \(4, 0, 0\), outside the shape \(4, 20, 18\)"),
    ],
)
def test_hdf5_dataspace_stating_fewer_sections_is_refused(tmp_path, volume, chunks, message):
    # The dataspace message holds the dimensions as 8-byte little-endian sizes, and default
    # files have no checksum over it (HDF5 File Format Specification, "Dataspace Message",
    # version 1 object headers): one changed bit turns 5 sections into 4, read without error.
    path = tmp_path / "stack.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("raw", data=volume, chunks=chunks)
    data = path.read_bytes()
    dims = struct.pack("<3Q", *volume.shape)
    assert data.count(dims) == 2  # the current dimensions, then the maximum ones
    path.write_bytes(data.replace(dims, struct.pack("<3Q", 4, *volume.shape[1:]), 1))
    _refused(tmp_path, path, "hdf5", "raw", message)


@pytest.mark.parametrize("damage", ["filter skipped", "pipeline lost"])
def test_hdf5_compressed_chunks_are_never_read_as_pixels(tmp_path, volume, damage):
    # A chunk's filter mask says which filters were skipped for it, and a dataset without a
    # filter pipeline stores every chunk whole (HDF5 File Format Specification, "Data Storage -
    # Filter Pipeline Message" and version 1 B-tree chunk records; neither has a checksum in
    # default files). Either damage makes h5py return the deflate bytes as pixel values; the
    # chunks are written directly here as such damage leaves them.
    path = tmp_path / "stack.h5"
    chunks = (1, *volume.shape[1:])
    packed = zlib.compress(np.ascontiguousarray(volume[0]).tobytes())
    with h5py.File(path, "w") as f:
        kw = {"compression": "gzip"} if damage == "filter skipped" else {}
        raw = f.create_dataset("raw", data=volume, chunks=chunks, **kw)
        raw.id.write_direct_chunk((0, 0, 0), packed, filter_mask=1)
    text = _refused(tmp_path, path, "hdf5", "raw", "is stored unfiltered")
    assert "the chunk at offset (0, 0, 0) is stored unfiltered in" in text
    assert f"bytes, a whole chunk takes {volume[0].nbytes}" in text


def test_unreadable_hdf5_file_is_refused(tmp_path):
    path = tmp_path / "stack.h5"
    path.write_bytes(b"not an HDF5 file at all")
    text = _refused(tmp_path, path, "hdf5", "raw", "stack.h5")
    assert "cannot read as HDF5" in text


def test_hdf5_external_link_is_refused(tmp_path, volume):
    other = tmp_path / "elsewhere.h5"
    with h5py.File(other, "w") as f:
        f["raw"] = volume
    path = tmp_path / "stack.h5"
    with h5py.File(path, "w") as f:
        f["raw"] = h5py.ExternalLink(str(other), "/raw")
    text = _refused(tmp_path, path, "hdf5", "raw", "raw")
    assert "'raw' is an external link to" in text and "name that file in the sheet instead" in text


def test_internal_path_is_refused_for_single_stack_formats(tmp_path, volume):
    path = tmp_path / "s.mrc"
    path.write_bytes(b"")
    text = _refused(tmp_path, path, "mrc", "raw", "s.mrc")
    assert "internal_path 'raw' is given, but format mrc holds one stack per file" in text


def _ome_zarr_input(path, volume, *, scale, unit, drop_level=None):
    """An OME-Zarr 0.5 image as another writer may leave it: two levels, axes in `unit`."""
    from tessera.io.omezarr import multiscale_attrs

    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    ome = multiscale_attrs(name="raw", spacing=(1, 1, 1), factors=[(1, 1, 1), (1, 2, 2)])
    ms = ome["multiscales"][0]
    for axis in ms["axes"]:
        axis.pop("unit")
        if unit is not None:
            axis["unit"] = unit
    for k, dataset in enumerate(ms["datasets"]):
        dataset["coordinateTransformations"] = [
            {"type": "scale", "scale": [scale[0], scale[1] * 2**k, scale[2] * 2**k]}
        ]
    group.attrs["ome"] = ome
    group.create_array("0", data=volume, chunks=(1, *volume.shape[1:]))
    group.create_array("1", data=volume[:, ::2, ::2], chunks=(1, *volume.shape[1:]))
    if drop_level is not None:
        import shutil

        shutil.rmtree(path / drop_level)
    return path


@pytest.mark.parametrize(
    ("scale", "unit", "nm"),
    [
        # OME-NGFF 0.5: an axis's unit is a UDUNITS-2 length name; 1 angstrom = 0.1 nm (SI)
        ((400, 80, 80), "angstrom", (40.0, 8.0, 8.0)),
        ((0.04, 0.008, 0.008), "micrometer", (40.0, 8.0, 8.0)),
        ((40, 8, 8), "nanometer", (40.0, 8.0, 8.0)),
    ],
)
def test_ome_zarr_voxel_size_is_read_in_its_axes_units(tmp_path, volume, scale, unit, nm):
    # Before, the scale was read as nm whatever the unit: 10x too coarse for angstrom.
    src = _ome_zarr_input(tmp_path / "in.ome.zarr", volume, scale=scale, unit=unit)
    ingest_job(src, tmp_path / "out.ome.zarr", fmt="zarr", spacing=(None, None, None))
    assert open_image(tmp_path / "out.ome.zarr")[1]["spacing"] == pytest.approx(nm)
    # the sheet is held to the image's own scale, as to container attributes
    with pytest.raises(TesseraInputError) as info:
        ingest_job(src, tmp_path / "o2.ome.zarr", fmt="zarr", spacing=(40, 80, 8))
    assert (
        "attribute ome.multiscales scale (converted to nm) gives voxel size 8 nm along y, "
        "the sheet's voxel_y_nm says 80" in str(info.value)
    )


def test_ome_zarr_without_units_needs_the_sheet(tmp_path, volume):
    src = _ome_zarr_input(tmp_path / "in.ome.zarr", volume, scale=(400, 80, 80), unit=None)
    with pytest.raises(TesseraInputError) as info:
        ingest_job(src, tmp_path / "out.ome.zarr", fmt="zarr", spacing=(None, None, None))
    assert (
        "voxel size along z is blank in the sheet and the file header has none; "
        "fill voxel_z_nm (nm, > 0)" in str(info.value)
    )
    ingest_job(src, tmp_path / "o2.ome.zarr", fmt="zarr", spacing=(40, 8, 8))
    assert open_image(tmp_path / "o2.ome.zarr")[1]["spacing"] == (40.0, 8.0, 8.0)


@pytest.mark.parametrize("lost", ["0", "1"])
def test_ome_zarr_with_a_lost_level_is_refused_in_one_line(tmp_path, volume, lost):
    # Before, a level listed in the metadata but not on disk raised a KeyError traceback.
    src = _ome_zarr_input(
        tmp_path / "in.ome.zarr", volume, scale=(40, 8, 8), unit="nanometer", drop_level=lost
    )
    with pytest.raises(TesseraInputError) as info:
        open_stack(src, "zarr")
    message = str(info.value)
    assert message.startswith(str(src)) and "\n" not in message
    assert "the multiscale metadata lists level" in message
    assert "but the image has no such array (a level lost in copying?)" in message


@pytest.mark.parametrize("names", [["x", "y", "z"], ["y", "x", "z"]])
def test_ome_zarr_with_other_axes_than_z_y_x_is_refused(tmp_path, volume, names):
    # OME-NGFF 0.5 lets an image name its space axes in any order; arrays here are read as
    # (z, y, x), so an (x, y, z) image read without this check came in transposed
    src = _ome_zarr_input(tmp_path / "in.ome.zarr", volume, scale=(40, 8, 8), unit="nanometer")
    group = zarr.open_group(str(src), mode="r+")
    ome = group.attrs["ome"]
    for axis, name in zip(ome["multiscales"][0]["axes"], names, strict=True):
        axis["name"] = name
    group.attrs["ome"] = ome
    with pytest.raises(TesseraInputError) as info:
        open_stack(src, "zarr")
    message = str(info.value)
    assert message.startswith(str(src)) and "\n" not in message
    assert f"its axes are {names}; expected the three space axes ['z', 'y', 'x'] in that order" in (
        message
    )


def test_ome_zarr_whose_first_level_is_not_the_finest_is_refused(tmp_path, volume):
    # OME-NGFF lists levels from the highest resolution down; the first is read as level 0
    src = _ome_zarr_input(tmp_path / "in.ome.zarr", volume, scale=(40, 8, 8), unit="nanometer")
    group = zarr.open_group(str(src), mode="r+")
    ome = group.attrs["ome"]
    ome["multiscales"][0]["datasets"].reverse()
    group.attrs["ome"] = ome
    with pytest.raises(TesseraInputError) as info:
        open_stack(src, "zarr")
    assert (
        "level '0' (scale [40, 8, 8]) is finer than the first level '1' (scale [40, 16, 16]); "
        "expected the levels listed from the finest to coarser ones" in str(info.value)
    )


def test_ome_zarr_with_a_length_unit_unknown_is_refused(tmp_path, volume):
    src = _ome_zarr_input(tmp_path / "in.ome.zarr", volume, scale=(40, 8, 8), unit="parsecs")
    with pytest.raises(TesseraInputError) as info:
        open_stack(src, "zarr")
    assert "axis 'z' has unit 'parsecs'; expected a length unit of OME-Zarr (" in str(info.value)


def _ome_zarr_04(path, volume, *, unit, scale=(0.04, 0.008, 0.008), image="", extra=None):
    """An invented OME-Zarr 0.4 image in zarr format 2: "multiscales" at the top of the image
    group's attributes, levels "0" and "1" (the latter 2x coarser in y and x), axes in `unit`.
    Layout from the OME-NGFF 0.4 specification (from memory)."""
    root = zarr.open_group(str(path), mode="w", zarr_format=2)
    group = root.create_group(image) if image else root
    axes = [{"name": a, "type": "space", **({"unit": unit} if unit else {})} for a in "zyx"]
    datasets = [
        {
            "path": str(k),
            "coordinateTransformations": [
                {"type": "scale", "scale": [scale[0], scale[1] * 2**k, scale[2] * 2**k]}
            ],
        }
        for k in range(2)
    ]
    multiscale = {"version": "0.4", "name": "raw", "axes": axes, "datasets": datasets}
    group.attrs["multiscales"] = [multiscale | (extra or {})]
    group.create_array("0", data=volume, chunks=(1, *volume.shape[1:]))
    group.create_array("1", data=volume[:, ::2, ::2], chunks=(1, *volume.shape[1:]))
    return path


@pytest.mark.parametrize(
    ("unit", "scale", "level", "nm"),
    [
        # 1 micrometer = 1000 nm (SI); level 1 is 2x coarser in y and x, as its scale says
        ("micrometer", (0.04, 0.008, 0.008), "0", (40.0, 8.0, 8.0)),
        ("micrometer", (0.04, 0.008, 0.008), "1", (40.0, 16.0, 16.0)),
        ("nanometer", (40, 8, 8), "0", (40.0, 8.0, 8.0)),
    ],
)
def test_a_level_of_an_ome_zarr_04_image_takes_its_voxel_size_from_the_multiscales(
    tmp_path, volume, unit, scale, level, nm
):
    src = _ome_zarr_04(tmp_path / "in.ome.zarr", volume, unit=unit, scale=scale)
    ingest_job(src, tmp_path / "out.ome.zarr", fmt="zarr", internal_path=level, spacing=(None,) * 3)
    _, info = open_image(tmp_path / "out.ome.zarr")
    assert info["spacing"] == pytest.approx(nm)
    expected = volume if level == "0" else volume[:, ::2, ::2]
    np.testing.assert_array_equal(info["levels"][0][:], expected)


def test_an_ome_zarr_04_image_inside_a_container_and_its_multiscale_scale(tmp_path, volume):
    # the image group "em/raw" inside the container; a multiscale-wide scale (z 2x) applies
    # after each level's own (OME-NGFF 0.4): 0.02 um x 2 = 40 nm along z
    src = _ome_zarr_04(
        tmp_path / "c.zarr",
        volume,
        unit="micrometer",
        scale=(0.02, 0.008, 0.008),
        image="em/raw",
        extra={"coordinateTransformations": [{"type": "scale", "scale": [2, 1, 1]}]},
    )
    stack = open_stack(src, "zarr", internal_path="em/raw/0")
    try:
        assert stack.header_spacing == pytest.approx((40.0, 8.0, 8.0))
    finally:
        stack.close()


def test_an_ome_zarr_04_scale_is_held_to_the_sheet_and_without_units_the_sheet_is_needed(
    tmp_path, volume
):
    src = _ome_zarr_04(tmp_path / "in.ome.zarr", volume, unit="micrometer")
    with pytest.raises(TesseraInputError) as info:
        ingest_job(src, tmp_path / "o.ome.zarr", fmt="zarr", internal_path="0", spacing=(40, 80, 8))
    assert str(info.value) == (
        f"{src}, internal_path 0: attribute multiscales scale of the container's top group "
        "(converted to nm) gives voxel size 8 nm along y, the sheet's voxel_y_nm says 80; "
        "correct one of them or blank the sheet's cell"
    )
    bare = _ome_zarr_04(tmp_path / "bare.ome.zarr", volume, unit=None, scale=(40, 8, 8))
    with pytest.raises(TesseraInputError) as info:
        ingest_job(
            bare, tmp_path / "o.ome.zarr", fmt="zarr", internal_path="0", spacing=(None,) * 3
        )
    assert "voxel size along z is blank in the sheet and the file header has none" in str(
        info.value
    )


def test_an_ome_zarr_04_level_with_a_bad_scale_is_refused_in_one_line(tmp_path, volume):
    src = _ome_zarr_04(tmp_path / "in.ome.zarr", volume, unit="micrometer")
    group = zarr.open_group(str(src), mode="r+")
    multiscales = group.attrs["multiscales"]
    multiscales[0]["datasets"][0]["coordinateTransformations"][0]["scale"] = [0.04, 0.008]
    group.attrs["multiscales"] = multiscales
    text = _refused(tmp_path, src, "zarr", "0", "internal_path 0")
    assert text == (
        f"{src}, internal_path 0: attribute multiscales, level '0', has scale [0.04, 0.008]; "
        "expected 3 numbers > 0 (z, y, x)"
    )
