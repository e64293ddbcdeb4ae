"""Separating touching organelles: step 6 of :mod:`tessera.objects`, one component at a time.

A component that holds several organelles pressed together is split by a seeded watershed on
its Euclidean distance transform in nm (so anisotropic voxels are measured as they are). The
seeds are the distance's regional maxima that stand out: a maximum counts only if it rises at
least `min_depth_nm` above the lowest point of the best path (the saddle) to a higher maximum
(an h-maximum, with h = `min_depth_nm`). Two balls of radius r joined by a neck of radius a
have maxima of depth about r - a, so a neck wider than ``r - min_depth_nm`` keeps them one
object, and a thin contact splits them. The component's highest maximum always counts; a
component whose distance never exceeds `min_depth_nm` stays whole.
"""

import numpy as np
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from skimage.morphology import h_maxima
from skimage.segmentation import watershed

from tessera.errors import TesseraInputError


def check_split_depth(min_depth_nm):
    """Refuse a depth that is not a positive number of nm.

    Examples
    --------
    >>> check_split_depth(40.0)
    >>> check_split_depth(-5)
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: objects split_min_depth_nm must be > 0 nm, got -5
    """
    ok = isinstance(min_depth_nm, (int, float)) and not isinstance(min_depth_nm, bool)
    if not ok or not np.isfinite(min_depth_nm) or min_depth_nm <= 0:
        raise TesseraInputError(f"objects split_min_depth_nm must be > 0 nm, got {min_depth_nm!r}")


def split_seeds(distance, *, min_depth_nm, structure):
    """Seeds of the watershed: the h-maxima of `distance`, labelled (int32, 0 = none).

    Parameters
    ----------
    distance : ndarray of float
        Distance to the background in nm (0 outside the object).
    min_depth_nm : float
        How far a maximum must rise above its saddle with a higher maximum to count.
    structure : ndarray of bool
        Neighbourhood of the objects' connectivity (3 x 3 x 3).

    Examples
    --------
    >>> d = np.array([[[0, 4, 2, 3, 0]]], np.float32)  # the lower maximum is 1 above the saddle
    >>> split_seeds(d, min_depth_nm=1, structure=np.ones((3, 3, 3), bool))[0, 0].tolist()
    [0, 1, 0, 2, 0]
    >>> split_seeds(d, min_depth_nm=2, structure=np.ones((3, 3, 3), bool))[0, 0].tolist()
    [0, 1, 0, 0, 0]

    Maxima of equal height (a symmetric dumbbell) are kept by the h-maxima transform alone;
    :func:`split_touching` joins them again when their saddle is too shallow.
    """
    peaks = h_maxima(distance, distance.dtype.type(min_depth_nm), footprint=structure)
    seeds, _ = ndimage.label(peaks, structure)
    return seeds.astype(np.int32)


def split_touching(mask, *, spacing, min_depth_nm, structure):
    """Split one object (a connected mask) into the organelles it holds.

    Parameters
    ----------
    mask : (Z, Y, X) ndarray of bool
        One connected object in a box with a margin of background on every side the volume
        allows (voxels outside the array are not counted as background).
    spacing : (float, float, float)
        Voxel size z, y, x in nm.
    min_depth_nm : float
        See :func:`split_seeds`.
    structure : ndarray of bool
        Neighbourhood of the objects' connectivity; each piece is connected under it.

    Returns
    -------
    ndarray of int32
        Pieces 1..k in raster order of their first voxel, 0 outside `mask` (k = 1: not split).

    Examples
    --------
    >>> z, y, x = np.ogrid[:1, :9, :17]
    >>> two = ((y - 4) ** 2 + (x - 4) ** 2 <= 12) | ((y - 4) ** 2 + (x - 11) ** 2 <= 12)
    >>> pieces = split_touching(two, spacing=(10, 10, 10), min_depth_nm=5,
    ...                         structure=np.ones((3, 3, 3), bool))
    >>> int(pieces.max()), int(pieces[0, 4, 3]), int(pieces[0, 4, 12])
    (2, 1, 2)
    """
    distance = ndimage.distance_transform_edt(mask, sampling=spacing).astype(np.float32)
    seeds = split_seeds(distance, min_depth_nm=min_depth_nm, structure=structure)
    if seeds.max() <= 1:
        return mask.astype(np.int32)
    pieces = watershed(-distance, seeds, mask=mask, connectivity=structure)
    pieces = _join_shallow(pieces, distance, min_depth_nm=min_depth_nm, structure=structure)
    # number the pieces in raster order of their first voxel, as the objects are numbered
    ids, first = np.unique(pieces.ravel(), return_index=True)
    ids, first = ids[ids > 0], first[ids > 0]
    lut = np.zeros(int(pieces.max()) + 1, np.int32)
    lut[ids[np.argsort(first, kind="stable")]] = np.arange(1, len(ids) + 1, dtype=np.int32)
    return lut[pieces]


def _neighbour_offsets(structure):
    """One offset of each pair of opposite neighbours of the structure (z, y, x)."""
    centre = np.array(structure.shape) // 2
    offsets = np.argwhere(structure) - centre
    return [o for o in offsets if tuple(o) > (0, 0, 0)]


def _join_shallow(pieces, distance, *, min_depth_nm, structure):
    """Join neighbouring pieces whose saddle lies less than `min_depth_nm` below the lower peak.

    The h-maxima transform already drops every maximum with a higher one less than
    `min_depth_nm` above their saddle; what it keeps and this joins are maxima of equal height
    (neither is the higher one). The saddle of two pieces is the highest distance at which
    they touch (the larger of the two sides' minimum over each touching pair of voxels)."""
    n = int(pieces.max())
    peaks = ndimage.maximum(distance, pieces, np.arange(1, n + 1))
    pairs, levels = [], []
    for offset in _neighbour_offsets(structure):
        here = tuple(
            slice(max(0, -k), s - max(0, k)) for k, s in zip(offset, pieces.shape, strict=True)
        )
        there = tuple(
            slice(max(0, k), s - max(0, -k)) for k, s in zip(offset, pieces.shape, strict=True)
        )
        a, b = pieces[here], pieces[there]
        touch = (a > 0) & (b > 0) & (a != b)
        pairs.append(np.stack([a[touch], b[touch]], 1))
        levels.append(np.minimum(distance[here][touch], distance[there][touch]))
    pairs, levels = np.concatenate(pairs), np.concatenate(levels)
    lower = np.minimum(peaks[pairs[:, 0] - 1], peaks[pairs[:, 1] - 1])
    # a pair is joined if at its highest touching point it is shallow: lower - max(level) < h
    shallow = pairs[lower - levels < min_depth_nm] - 1
    if not len(shallow):
        return pieces
    graph = coo_matrix((np.ones(len(shallow), np.int8), tuple(shallow.T)), shape=(n, n))
    _, joined = connected_components(graph, directed=False)
    return np.concatenate([[0], joined + 1])[pieces].astype(np.int32)
