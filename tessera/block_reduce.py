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
    # Sum each axis in turn over strided slices (k::f), in float64 so that the average is
    # exact for 8/16-bit input before the final float32 cast; a block cut by the edge gets
    # fewer terms, and the count of each block is the product of its per-axis counts.
    sums = image
    for axis, f in enumerate(factors):
        if f == 1:
            continue
        n = image.shape[axis]
        lead = (slice(None),) * axis
        acc = sums[lead + (slice(0, None, f),)].astype(np.float64)
        for k in range(1, min(f, n)):
            part = sums[lead + (slice(k, None, f),)]
            acc[lead + (slice(0, part.shape[axis]),)] += part
        sums = acc
    sums = np.asarray(sums, dtype=np.float64)
    count = np.ones((), np.float64)
    for axis, f in enumerate(factors):
        n, out = image.shape[axis], sums.shape[axis]
        per = np.minimum(f, n - f * np.arange(out)).astype(np.float64)
        count = count * per.reshape((-1,) + (1,) * (image.ndim - axis - 1))
    return (sums / count).astype(np.float32)
