"""Multiscale pyramid by block averaging, streamed band by band.

Level ``k`` is level ``k - 1`` averaged over 2 × 2 blocks in-plane (and over 2 sections too when
``downsample_z`` is set, for near-isotropic data such as FIB-SEM). Edge blocks that stick out of
an odd-sized image are averaged over the voxels that exist, so no zero padding darkens borders.
"""

import os
import shutil
from pathlib import Path

import numpy as np
import zarr

from tessera.block_reduce import block_mean
from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.omezarr import AXES, multiscale_attrs, open_image
from tessera.io.store_checksums import record_checksums


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
