"""Structuring elements and the cleaned mask: steps 1-2 of :mod:`tessera.objects`."""

import numpy as np
from scipy import ndimage

from tessera.errors import TesseraInputError
from tessera.threshold import apply_threshold

CONNECTIVITY = {6: 1, 18: 2, 26: 3}  # neighbours in 3D -> rank of scipy's binary structure


def connectivity_structure(connectivity):
    """The 3 x 3 x 3 neighbourhood of 6-, 18- or 26-connectivity.

    Examples
    --------
    >>> int(connectivity_structure(6).sum()), int(connectivity_structure(26).sum())
    (7, 27)
    """
    if connectivity not in CONNECTIVITY:
        raise TesseraInputError(f"connectivity must be 6, 18 or 26, got {connectivity!r}")
    return ndimage.generate_binary_structure(3, CONNECTIVITY[connectivity])


def ball(radius_nm, spacing):
    """Ellipsoid structuring element of `radius_nm` in physical space; None for radius 0.

    Parameters
    ----------
    radius_nm : float
    spacing : (float, float, float)
        Voxel size z, y, x in nm.

    Examples
    --------
    >>> ball(20, (40, 10, 10)).shape  # 0 voxels along z, 2 in-plane
    (1, 5, 5)
    """
    if radius_nm < 0:
        raise TesseraInputError(f"morphology radius must be >= 0 nm, got {radius_nm}")
    if radius_nm == 0:
        return None
    semi = [radius_nm / s for s in spacing]
    reach = [int(np.floor(r)) for r in semi]
    grids = np.ogrid[tuple(slice(-k, k + 1) for k in reach)]
    return sum((g / r) ** 2 for g, r in zip(grids, semi, strict=True)) <= 1.0


def reach(element):
    """Voxels the element reaches from its centre along z, y, x (0 for no element).

    Examples
    --------
    >>> reach(ball(20, (40, 10, 10))).tolist(), reach(None).tolist()
    ([0, 2, 2], [0, 0, 0])
    """
    return np.zeros(3, int) if element is None else np.array(element.shape) // 2


def clean_mask(prob, *, low, opening=None, closing=None):
    """Steps 1-2 on an in-memory array: threshold, then opening and closing.

    Parameters
    ----------
    prob : ndarray
        Probabilities.
    low : float
        Voxels above it are foreground.
    opening, closing : ndarray of bool, optional
        Structuring elements (:func:`ball`); outside the array counts as background for the
        opening and as foreground for the closing, so the array edge neither erodes nor grows.

    Examples
    --------
    >>> p = np.zeros((1, 5, 7)); p[0, 1:4, 1:4] = 0.9; p[0, 2, 5] = 0.9  # a square and a speck
    >>> clean_mask(p, low=0.5, opening=np.ones((1, 3, 3), bool)).astype(int)[0]
    array([[0, 0, 0, 0, 0, 0, 0],
           [0, 1, 1, 1, 0, 0, 0],
           [0, 1, 1, 1, 0, 0, 0],
           [0, 1, 1, 1, 0, 0, 0],
           [0, 0, 0, 0, 0, 0, 0]])
    """
    mask = apply_threshold(prob, low)
    if opening is not None:
        mask = ndimage.binary_erosion(mask, opening, border_value=0)
        mask = ndimage.binary_dilation(mask, opening, border_value=0)
    if closing is not None:
        mask = ndimage.binary_dilation(mask, closing, border_value=0)
        mask = ndimage.binary_erosion(mask, closing, border_value=1)
    return mask
