"""The pyramid job: a single-level OME-Zarr image -> a multiscale one, by block means.

Level 0 is the ingested array itself, hard-linked into the new store; each further level is the
one before averaged over 2 x 2 blocks in-plane (and 2 sections when ``downsample_z`` is true, or
``"auto"`` and the stack is near-isotropic), written band by band
(:func:`tessera.pyramid.downsample_level`).
"""

from pathlib import Path

import zarr

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.links import link_tree
from tessera.io.omezarr import AXES, multiscale_attrs, open_image
from tessera.io.store_checksums import record_checksums
from tessera.pyramid import downsample_level
from tessera.spacing import near_isotropic


def pyramid_job(image_path, out_path, *, levels=3, downsample_z="auto"):
    """Make a multiscale OME-Zarr image from a single-level one.

    Parameters
    ----------
    image_path : str or Path
        Single-level OME-Zarr image (from :func:`~tessera.workflow.jobs.ingest.ingest_job`);
        not modified.
    out_path : str or Path
        Multiscale OME-Zarr image to create (atomically).
    levels : int, optional
        Number of reduced levels beyond level 0 (each halves y and x).
    downsample_z : bool or "auto", optional
        Halve z too at each level. ``"auto"``: only where the voxels as acquired are
        near-isotropic (:func:`tessera.spacing.near_isotropic`, as FIB-SEM), so a coarser level
        stays isotropic; serial-section TEM and SBEM are reduced in plane only.

    Returns
    -------
    list of tuple
        The reduction factors (z, y, x) of every level, level 0 first.
    """
    if not isinstance(levels, int) or levels < 0:
        raise TesseraInputError(f"levels must be an integer >= 0, got {levels!r}")
    if not (isinstance(downsample_z, bool) or downsample_z == "auto"):
        raise TesseraInputError(f"downsample_z must be true, false or 'auto', got {downsample_z!r}")
    group, info = open_image(image_path)
    level0 = info["levels"][0]
    if downsample_z == "auto":
        downsample_z = near_isotropic(info["spacing"])
    step = (2 if downsample_z else 1, 2, 2)
    factors = [(1, 1, 1)]
    for _ in range(levels):
        factors.append(tuple(f * s for f, s in zip(factors[-1], step, strict=False)))
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
            shape = tuple(-(-s // k) for s, k in zip(previous.shape, step, strict=False))
            chunks = tuple(min(c, s) for c, s in zip(level0.chunks, shape, strict=False))
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
