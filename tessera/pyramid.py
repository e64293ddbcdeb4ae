"""Multiscale pyramid by block averaging, streamed band by band.

Level ``k`` is level ``k - 1`` averaged over 2 × 2 blocks in-plane (and over 2 sections too when
``downsample_z`` is set, for near-isotropic data such as FIB-SEM). Edge blocks that stick out of
an odd-sized image are averaged over the voxels that exist, so no zero padding darkens borders.
"""

import numpy as np

from tessera.block_reduce import block_mean


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
