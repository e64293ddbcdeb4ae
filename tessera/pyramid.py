"""Multiscale pyramid by block averaging, streamed band by band.

Level ``k`` is level ``k - 1`` averaged over 2 × 2 blocks in-plane (and over 2 sections too when
``downsample_z`` is set, for near-isotropic data such as FIB-SEM). Edge blocks that stick out of
an odd-sized image are averaged over the voxels that exist, so no zero padding darkens borders.
"""

import os
import shutil
from pathlib import Path

import numpy as np

from tessera.errors import TesseraInputError


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


def link_tree(src, dst):
    """Hard-link every file of `src` into `dst` (copy where links are impossible).

    Level 0 of the pyramid is the ingested array itself; hard links make it part of the new
    multiscale store without duplicating terabytes and without touching the ingest output.
    """
    for root, _, files in os.walk(src):
        target = Path(dst) / Path(root).relative_to(src)
        target.mkdir(parents=True, exist_ok=True)
        for f in files:
            try:
                os.link(Path(root) / f, target / f)
            except OSError:
                shutil.copy2(Path(root) / f, target / f)


def downsample_level(source, target, *, factors, band_rows=None):
    """Write `target` = block mean of `source` by `factors`, one band of rows at a time.

    Parameters
    ----------
    source, target : zarr.Array
        3D z, y, x arrays; ``target.shape == ceil(source.shape / factors)``. Block means are
        rounded to the nearest value of an integer `target` dtype.
    factors : (int, int, int)
        Reduction per axis.
    band_rows : int, optional
        Output rows per band; defaults to the target's chunk height so every chunk is written
        once.

    Examples
    --------
    >>> source = np.arange(16, dtype=np.uint8).reshape(1, 4, 4) * 2
    >>> target = np.zeros((1, 2, 2), dtype=np.uint8)  # numpy arrays work too, given band_rows
    >>> downsample_level(source, target, factors=(1, 2, 2), band_rows=1)
    >>> target[0]
    array([[ 5,  9],
           [21, 25]], dtype=uint8)
    """
    fz, fy, fx = factors
    band_rows = band_rows or target.chunks[1]
    for oz in range(target.shape[0]):
        z0, z1 = oz * fz, min((oz + 1) * fz, source.shape[0])
        for oy in range(0, target.shape[1], band_rows):
            y0, y1 = oy * fy, min((oy + band_rows) * fy, source.shape[1])
            block = block_mean(source[z0:z1, y0:y1, :], (z1 - z0, fy, fx))
            target[oz : oz + 1, oy : oy + block.shape[1], :] = _round_to(block, target.dtype)
