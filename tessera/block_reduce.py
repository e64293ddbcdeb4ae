"""Reduction of an array by non-overlapping blocks (downsampling by averaging).

A pure array function shared by the pyramid, the training tiles and the cascade's coarse levels.
"""

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
    out_shape = tuple(-(-s // f) for s, f in zip(image.shape, factors, strict=True))
    padded_shape = tuple(o * f for o, f in zip(out_shape, factors, strict=True))
    pad = [(0, p - s) for p, s in zip(padded_shape, image.shape, strict=True)]
    data = np.pad(image.astype(np.float32), pad)
    counts = np.pad(np.ones(image.shape, dtype=np.float32), pad)
    split = [d for o, f in zip(out_shape, factors, strict=True) for d in (o, f)]
    axes = tuple(range(1, 2 * image.ndim, 2))
    # float64 sums keep the average exact for 8/16-bit input before the final float32 cast.
    sums = data.reshape(split).sum(axis=axes, dtype=np.float64)
    n = counts.reshape(split).sum(axis=axes, dtype=np.float64)
    return (sums / n).astype(np.float32)
