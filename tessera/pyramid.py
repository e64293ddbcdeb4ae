"""Multiscale pyramid by block averaging, streamed band by band.

Level ``k`` is level ``k - 1`` averaged over 2 × 2 blocks in-plane (and over 2 sections too when
``downsample_z`` is set, for near-isotropic data such as FIB-SEM). Edge blocks that stick out of
an odd-sized image are averaged over the voxels that exist, so no zero padding darkens borders.
"""

from pathlib import Path

import numpy as np
import zarr

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.links import link_tree
from tessera.io.omezarr import AXES, multiscale_attrs, open_image
from tessera.io.store_checksums import record_checksums


def block_mean(image, factors):
    """Average non-overlapping blocks of `factors` voxels.

    Parameters
    ----------
    image : ndarray
        Any numeric dtype.
    factors : sequence of int
        Block size per axis (>= 1).

    Returns
    -------
    ndarray of float32
        Shape ``ceil(image.shape / factors)``. Blocks cut by the image edge average only the
        voxels inside the image.

    Notes
    -----
    Where the shape is a multiple of `factors`, this equals
    ``skimage.transform.downscale_local_mean`` (which pads edge blocks with zeros otherwise).

    Examples
    --------
    >>> block_mean(np.array([[0, 2, 4], [2, 4, 6]], dtype=np.uint8), (2, 2))
    array([[2., 5.]], dtype=float32)
    """
    image = np.asarray(image)
    factors = tuple(int(f) for f in factors)
    if len(factors) != image.ndim or min(factors) < 1:
        raise TesseraInputError(f"factors must be {image.ndim} integers >= 1, got {factors}")
    if image.size == 0:
        raise TesseraInputError("cannot downsample an empty image")
    out_shape = tuple(-(-s // f) for s, f in zip(image.shape, factors))
    padded_shape = tuple(o * f for o, f in zip(out_shape, factors))
    pad = [(0, p - s) for p, s in zip(padded_shape, image.shape)]
    data = np.pad(image.astype(np.float32), pad)
    counts = np.pad(np.ones(image.shape, dtype=np.float32), pad)
    split = [d for o, f in zip(out_shape, factors) for d in (o, f)]
    axes = tuple(range(1, 2 * image.ndim, 2))
    # float64 sums keep the average exact for 8/16-bit input before the final float32 cast.
    sums = data.reshape(split).sum(axis=axes, dtype=np.float64)
    n = counts.reshape(split).sum(axis=axes, dtype=np.float64)
    return (sums / n).astype(np.float32)


def _round_to(values, dtype):
    if np.issubdtype(dtype, np.floating):
        return values.astype(dtype)
    info = np.iinfo(dtype)
    return np.clip(np.rint(values), info.min, info.max).astype(dtype)


def downsample_level(source, target, *, factors, band_rows=None):
    """Write `target` = block mean of `source` by `factors`, one band of rows at a time.

    Parameters
    ----------
    source, target : zarr.Array
        3D z, y, x arrays; ``target.shape == ceil(source.shape / factors)``.
    factors : (int, int, int)
        Reduction per axis.
    band_rows : int, optional
        Output rows per band; defaults to the target's chunk height so every chunk is written
        once.
    """
    fz, fy, fx = factors
    band_rows = band_rows or target.chunks[1]
    for oz in range(target.shape[0]):
        z0, z1 = oz * fz, min((oz + 1) * fz, source.shape[0])
        for oy in range(0, target.shape[1], band_rows):
            y0, y1 = oy * fy, min((oy + band_rows) * fy, source.shape[1])
            block = block_mean(source[z0:z1, y0:y1, :], (z1 - z0, fy, fx))
            target[oz : oz + 1, oy : oy + block.shape[1], :] = _round_to(block, target.dtype)


def build_pyramid(image_path, out_path, *, levels=3, downsample_z=False):
    """Make a multiscale OME-Zarr image from a single-level one.

    Parameters
    ----------
    image_path : str or Path
        Single-level OME-Zarr image (from ``ingest_stack``); not modified.
    out_path : str or Path
        Multiscale OME-Zarr image to create (atomically).
    levels : int, optional
        Number of reduced levels beyond level 0 (each halves y and x).
    downsample_z : bool, optional
        Halve z too at each level (only for near-isotropic data).

    Returns
    -------
    list of tuple
        The reduction factors (z, y, x) of every level, level 0 first.
    """
    if not isinstance(levels, int) or levels < 0:
        raise TesseraInputError(f"levels must be an integer >= 0, got {levels!r}")
    group, info = open_image(image_path)
    level0 = info["levels"][0]
    step = (2 if downsample_z else 1, 2, 2)
    factors = [(1, 1, 1)]
    for _ in range(levels):
        factors.append(tuple(f * s for f, s in zip(factors[-1], step)))
    name = group.attrs["ome"]["multiscales"][0].get("name", "image")
    with atomic_path(out_path) as tmp:
        out = zarr.open_group(store=str(tmp), mode="w", zarr_format=3)
        extra = dict(info["extra"])
        extra["pyramid"] = {"factors": [list(f) for f in factors], "method": "block mean"}
        out.attrs.update(
            {
                "ome": multiscale_attrs(name=name, spacing=info["spacing"], factors=factors),
                "tessera": extra,
            }
        )
        link_tree(Path(image_path) / "0", tmp / "0")
        # read level 0 through the ingest store (the same files), so every chunk is verified
        previous = level0
        for level in range(1, levels + 1):
            shape = tuple(-(-s // k) for s, k in zip(previous.shape, step))
            chunks = tuple(min(c, s) for c, s in zip(level0.chunks, shape))
            current = out.create_array(
                name=str(level),
                shape=shape,
                chunks=chunks,
                dtype=level0.dtype,
                dimension_names=AXES,
            )
            downsample_level(previous, current, factors=step)
            previous = current
        record_checksums(tmp, linked={"0": image_path})  # level 0 keeps the ingest's records
    return factors
