"""Pyramid: block averaging against scikit-image, streaming, metadata, storage."""

import os
import shutil

import numpy as np
import pytest
import tifffile
import zarr
from ome_zarr_models.v05 import Image
from skimage.transform import downscale_local_mean

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image, working_level
from tessera.pyramid import block_mean, downsample_level
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.pyramid import pyramid_job


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
@pytest.mark.parametrize("factors", [(2, 2), (1, 2, 2), (2, 2, 2), (1, 4, 8)])
def test_block_mean_equals_skimage_downscale_local_mean(dtype, factors):
    # Reference library: skimage.transform.downscale_local_mean (exact where shapes divide).
    rng = np.random.default_rng(1)
    shape = tuple(f * n for f, n in zip(factors, (3, 5, 4), strict=False))
    image = (rng.random(shape) * 250).astype(dtype)
    expected = downscale_local_mean(image, factors)
    result = block_mean(image, factors)
    assert result.dtype == np.float32
    np.testing.assert_allclose(result, expected, rtol=1e-6)


def test_block_mean_edge_blocks_average_only_existing_pixels():
    image = np.arange(15, dtype=np.uint8).reshape(3, 5)
    result = block_mean(image, (2, 2))
    assert result.shape == (2, 3)
    # Worked by hand: bottom-right block holds only pixel 14; right column of the top row 4 and 9.
    assert result[1, 2] == 14
    assert result[0, 2] == pytest.approx((4 + 9) / 2)
    # skimage pads with zeros, which darkens such blocks: the two differ there, agree inside.
    ref = downscale_local_mean(image, (2, 2))
    assert ref[1, 2] == pytest.approx(14 / 4)
    np.testing.assert_allclose(result[:1, :2], ref[:1, :2])


def test_block_mean_rejects_bad_factors():
    with pytest.raises(TesseraInputError, match="factors must be 2 integers >= 1"):
        block_mean(np.zeros((4, 4)), (0, 2))


@pytest.mark.parametrize("band_rows", [1, 3, 16])
def test_streamed_level_is_independent_of_band_size(tmp_path, band_rows):
    rng = np.random.default_rng(2)
    data = rng.integers(0, 256, size=(3, 37, 29), dtype=np.uint8)
    src = zarr.create_array(
        store=str(tmp_path / "s.zarr"), shape=data.shape, chunks=(1, 8, 8), dtype="uint8"
    )
    src[:] = data
    out = zarr.create_array(
        store=str(tmp_path / "o.zarr"), shape=(3, 19, 15), chunks=(1, 8, 8), dtype="uint8"
    )
    downsample_level(src, out, factors=(1, 2, 2), band_rows=band_rows)
    expected = np.rint(block_mean(data, (1, 2, 2))).astype(np.uint8)
    np.testing.assert_array_equal(out[:], expected)


@pytest.mark.parametrize("downsample_z", [False, True])
def test_pyramid_levels_metadata_and_values(tmp_path, downsample_z):
    rng = np.random.default_rng(4)
    volume = rng.integers(0, 256, size=(8, 64, 48), dtype=np.uint8)
    tifffile.imwrite(tmp_path / "v.tif", volume)
    ingest_job(
        tmp_path / "v.tif",
        tmp_path / "a.ome.zarr",
        fmt="tiff_stack",
        spacing=(40, 8, 8),
        chunks=(1, 16, 16),
    )
    factors = pyramid_job(
        tmp_path / "a.ome.zarr", tmp_path / "p.ome.zarr", levels=3, downsample_z=downsample_z
    )
    fz = 2 if downsample_z else 1
    assert factors == [(1, 1, 1), (fz, 2, 2), (fz**2, 4, 4), (fz**3, 8, 8)]
    group, info = open_image(tmp_path / "p.ome.zarr")
    Image.from_zarr(group)  # NGFF 0.5 reference implementation (ome-zarr-models) accepts it
    assert info["factors"] == factors
    np.testing.assert_array_equal(info["levels"][0][:], volume)
    previous = volume
    for level in range(1, 4):
        # Each level is the rounded block mean of the one before (skimage reference where divisible).
        expected = np.rint(downscale_local_mean(previous, (fz, 2, 2))).astype(np.uint8)
        np.testing.assert_array_equal(info["levels"][level][:], expected)
        previous = info["levels"][level][:]
    ds = group.attrs["ome"]["multiscales"][0]["datasets"][1]["coordinateTransformations"]
    assert ds[0]["scale"] == [40.0 * fz, 16.0, 16.0]
    # A 2-voxel average is centred half a level-0 voxel in: translation (f - 1) / 2 * spacing.
    assert ds[1]["translation"] == [20.0 * (fz - 1), 4.0, 4.0]
    assert working_level(info["factors"], 4) == 2


@pytest.mark.parametrize(
    ("spacing", "halved"), [((5, 5, 5), True), ((10, 6, 6), True), ((40, 8, 8), False)]
)
def test_auto_halves_z_for_near_isotropic_stacks_only(tmp_path, spacing, halved):
    # Common practice: FIB-SEM (z about the pixel size) is reduced in all three axes so coarser
    # levels stay isotropic; SBEM and serial-section TEM (sections 3-10x thicker) in plane only.
    tifffile.imwrite(tmp_path / "v.tif", np.zeros((8, 32, 32), np.uint8))
    ingest_job(tmp_path / "v.tif", tmp_path / "a.ome.zarr", fmt="tiff_stack", spacing=spacing)
    factors = pyramid_job(tmp_path / "a.ome.zarr", tmp_path / "p.ome.zarr", levels=2)
    fz = 2 if halved else 1
    assert factors == [(1, 1, 1), (fz, 2, 2), (fz**2, 4, 4)]
    assert open_image(tmp_path / "p.ome.zarr")[1]["levels"][2].shape == (8 // fz**2, 8, 8)
    with pytest.raises(TesseraInputError, match="downsample_z must be true, false or 'auto'"):
        pyramid_job(tmp_path / "a.ome.zarr", tmp_path / "q.ome.zarr", downsample_z="yes")
    assert not (tmp_path / "q.ome.zarr").exists()


def test_level0_shares_storage_with_ingest_output(tmp_path):
    volume = np.full((2, 32, 32), 7, np.uint8)  # zarr skips writing all-fill chunks
    tifffile.imwrite(tmp_path / "v.tif", volume)
    ingest_job(tmp_path / "v.tif", tmp_path / "a.ome.zarr", fmt="tiff_stack", spacing=(40, 8, 8))
    pyramid_job(tmp_path / "a.ome.zarr", tmp_path / "p.ome.zarr", levels=1)
    chunk = next(p for p in (tmp_path / "p.ome.zarr" / "0" / "c").rglob("*") if p.is_file())
    twin = tmp_path / "a.ome.zarr" / chunk.relative_to(tmp_path / "p.ome.zarr")
    assert os.path.samefile(chunk, twin)
    # the pyramid's checksum manifest of level 0 is its own file: the ingest's one is not rewritten
    manifests = [
        store / "0" / "tessera-checksums.json"
        for store in (tmp_path / "p.ome.zarr", tmp_path / "a.ome.zarr")
    ]
    assert not os.path.samefile(*manifests)
    assert manifests[0].read_text() != manifests[1].read_text()
    # Removing the pyramid (as Snakemake does before a rerun) leaves the ingest output intact.
    shutil.rmtree(tmp_path / "p.ome.zarr")
    np.testing.assert_array_equal(open_image(tmp_path / "a.ome.zarr")[1]["levels"][0][:], volume)


def test_working_level_names_the_available_factors():
    with pytest.raises(
        TesseraInputError,
        match=r"no pyramid level is downsampled 16x in-plane; levels have \[1, 2\]",
    ):
        working_level([(1, 1, 1), (1, 2, 2)], 16)
