"""Separating touching organelles: step 6 of :mod:`tessera.objects`, one component at a time.

A component that holds several organelles pressed together is split by a seeded watershed on
its Euclidean distance transform in nm (so anisotropic voxels are measured as they are). The
seeds are the distance's regional maxima that stand out: a maximum counts only if it rises at
least `min_depth_nm` above the lowest point of the best path (the saddle) to a higher maximum
(an h-maximum, with h = `min_depth_nm`). Two balls of radius r joined by a neck of radius a
have maxima of depth about r - a, so a neck wider than ``r - min_depth_nm`` keeps them one
object, and a thin contact splits them. The component's highest maximum always counts; a
component whose distance never exceeds `min_depth_nm` stays whole.

Organelles pressed flat against each other leave no neck in the mask, so their distance has one
maximum; the probability map, though, usually dips along the contact (two membranes lie there).
With a `probability` and a `valley_probability` v, the distance of each voxel is scaled by
``min(p / v, 1)`` before seeds and watershed are computed (:func:`valley_height`): a voxel as
sure as v or surer keeps its distance, a less sure one is lowered in proportion. A dip of
probability across the contact becomes a saddle between two maxima (and the watershed's cut
follows it), while an organelle whose waist is as sure as v is split by its shape alone. The
probability only adds seeds: a seed of the shape whose basin the scaled distance leaves without
one is kept (:func:`valley_seeds`).
"""

import numpy as np
from scipy import ndimage
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


def check_valley_probability(valley_probability):
    """Refuse a valley probability that is not a probability above 0.

    Examples
    --------
    >>> check_valley_probability(0.8)
    >>> check_valley_probability(1.5)
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: objects split_valley_probability must be in (0, 1], got 1.5
    """
    v = valley_probability
    ok = isinstance(v, (int, float)) and not isinstance(v, bool)
    if not ok or not np.isfinite(v) or not 0 < v <= 1:
        raise TesseraInputError(f"objects split_valley_probability must be in (0, 1], got {v!r}")


def valley_height(distance, probability, *, valley_probability):
    """The distance scaled by how sure each voxel is: ``distance * min(p / v, 1)``.

    Parameters
    ----------
    distance : ndarray of float
        Distance to the background in nm.
    probability : ndarray of float
        Probability of the target, same shape.
    valley_probability : float
        v: voxels at least this sure keep their distance.

    Examples
    --------
    >>> d = np.array([10.0, 40.0, 40.0, 40.0])
    >>> valley_height(d, np.array([0.9, 1.0, 0.4, 0.8]), valley_probability=0.8).tolist()
    [10.0, 40.0, 20.0, 40.0]
    """
    scale = np.minimum(np.asarray(probability, np.float64) / float(valley_probability), 1.0)
    return distance * scale


def valley_seeds(valley, height, seeds, *, mask, min_depth_nm, structure):
    """Seeds of the split with the probability: those of `valley`, plus every seed of the shape
    whose basin holds none of them.

    Scaling can only lower the distance, so a maximum of the shape in an unsure region may sink
    below `min_depth_nm` in `valley`; its organelle would then be merged with a neighbour the
    shape alone separates. Keeping the shape's seed of every basin (the watershed of `height`
    from `seeds`) that `valley` leaves without a seed makes the probability add cuts only; where
    no voxel is below the valley probability, the seeds are those of the shape.

    Parameters
    ----------
    valley, height : ndarray of float
        The scaled and the plain distance (each with the tie-breaker).
    seeds : ndarray of int32
        Seeds of `height` (:func:`split_seeds`).
    mask : ndarray of bool
        The object.
    min_depth_nm, structure
        As :func:`split_seeds`.

    Examples
    --------
    >>> h = np.array([[[0, 5, 2, 5.1, 0]]]); v = np.array([[[0, 5, 2, 2.5, 0]]])
    >>> st = np.ones((3, 3, 3), bool)
    >>> s = split_seeds(h, min_depth_nm=1, structure=st)
    >>> split_seeds(v, min_depth_nm=1, structure=st)[0, 0].tolist()  # the unsure one sank
    [0, 1, 0, 0, 0]
    >>> valley_seeds(v, h, s, mask=h > 0, min_depth_nm=1, structure=st)[0, 0].tolist()
    [0, 1, 0, 2, 0]
    """
    found = split_seeds(valley, min_depth_nm=min_depth_nm, structure=structure)
    if seeds.max() <= 1:
        return found
    basins = watershed(-height, seeds, mask=mask, connectivity=structure)
    lost = np.setdiff1d(np.arange(1, int(seeds.max()) + 1), basins[found > 0])
    if not lost.size:
        return found
    extra = np.isin(seeds, lost)
    numbers = int(found.max()) + 1 + np.searchsorted(lost, seeds)
    return np.where(extra, numbers, found).astype(np.int32)


def absorb_small_pieces(pieces, seeds, height, *, mask, structure, voxel_nm3, min_volume_um3):
    """The watershed of `height` again without the seeds of pieces below `min_volume_um3`,
    until every piece meets it or one piece is left.

    Dropping seeds only lets the remaining basins grow, so the loop ends; a piece's label is
    its seed's.

    Parameters
    ----------
    pieces : ndarray of int32
        Watershed of ``-height`` from `seeds` within `mask` (labels are the seeds').
    seeds : ndarray of int32
    height : ndarray of float
    mask : ndarray of bool
    structure : ndarray of bool
    voxel_nm3, min_volume_um3 : float
        A piece's volume is its voxels times `voxel_nm3`, compared as the objects' size rule
        compares it (:func:`tessera.objects._passes.number_objects`).

    Examples
    --------
    A small knob beside a large box: split by its neck, then handed back to the box.

    >>> m = np.zeros((1, 5, 14), bool); m[0, :, :9] = True; m[0, 2, 9:12] = True
    >>> s = np.zeros(m.shape, np.int32); s[0, 2, 4] = 1; s[0, 2, 10] = 2
    >>> h = np.where(m, 1.0, 0.0)
    >>> p = watershed(-h, s, mask=m)
    >>> sorted(np.bincount(p.ravel())[1:].tolist())
    [8, 40]
    >>> st = np.ones((3, 3, 3), bool)
    >>> kw = dict(mask=m, structure=st, voxel_nm3=1e9)  # 1 um^3 voxels
    >>> np.unique(absorb_small_pieces(p, s, h, min_volume_um3=8, **kw)).tolist()
    [0, 1, 2]
    >>> np.unique(absorb_small_pieces(p, s, h, min_volume_um3=10, **kw)).tolist()
    [0, 1]
    """
    while True:
        sizes = np.bincount(pieces.ravel())[1:]
        small = np.flatnonzero((sizes > 0) & (sizes * voxel_nm3 / 1e9 < min_volume_um3)) + 1
        if not small.size:
            return pieces
        seeds = np.where(np.isin(seeds, small), 0, seeds).astype(np.int32)
        if len(np.unique(seeds[seeds > 0])) <= 1:
            return mask.astype(np.int32)
        pieces = watershed(-height, seeds, mask=mask, connectivity=structure)


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

    Maxima of equal height are both kept whatever their saddle (neither is the higher one):
    :func:`split_touching` adds :func:`tie_breaker` to the distance first.
    """
    peaks = h_maxima(distance, distance.dtype.type(min_depth_nm), footprint=structure)
    seeds, _ = ndimage.label(peaks, structure)
    return seeds.astype(np.int32)


def tie_breaker(shape, origin=(0, 0, 0)):
    """A tiny height (< 0.001 nm) added to the distance so that no two maxima are equal.

    Distances on a voxel grid take few values, so plateaus and equal maxima are common (a
    symmetric dumbbell has two); of two equal maxima neither would be the higher one, and both
    would count whatever the saddle between them. The added height is a fixed function of the
    voxel's position in the volume (the fractional part of a low-discrepancy sequence,
    ``z / g + y / g**2 + x / g**3`` with g**4 = g + 1), the same whatever
    box or block the voxel is read in.

    Examples
    --------
    >>> t = tie_breaker((2, 3, 4), origin=(5, 0, 7))
    >>> bool((t >= 0).all() and (t < 1e-3).all()), len(np.unique(t)) == t.size
    (True, True)
    >>> bool(tie_breaker((1, 1, 1), origin=(5, 2, 9))[0, 0, 0] == t[0, 2, 2])
    True
    """
    # the root of x**4 = x + 1 (low-discrepancy sequences in 3D): 1, 1/g, 1/g**2 and 1/g**3
    # are linearly independent over the rationals, so no two voxels get the same phase
    g = 1.2207440846057596
    z, y, x = (np.arange(n, dtype=np.float64) + o for n, o in zip(shape, origin, strict=True))
    phase = z[:, None, None] / g + y[None, :, None] / g**2 + x[None, None, :] / g**3
    return (phase % 1.0) * 1e-3


def split_touching(
    mask,
    *,
    spacing,
    min_depth_nm,
    structure,
    origin=(0, 0, 0),
    probability=None,
    valley_probability=None,
    min_volume_um3=0.0,
):
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
    origin : (int, int, int)
        Position of the box's first voxel in the volume (for :func:`tie_breaker`).
    probability : (Z, Y, X) ndarray of float, optional
        Probability of the target in the same box (0..1).
    valley_probability : float, optional
        With `probability`: the distance is lowered where the probability is below this level
        (:func:`valley_height`). Either one None: the shape alone decides.
    min_volume_um3 : float
        The objects' size rule: a piece smaller than this is a fragment of its neighbours,
        not an organelle; its seed is dropped and the watershed run again, so its voxels join
        the pieces around it (:func:`absorb_small_pieces`). The object itself passed the rule.

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

    A bar with no neck is one object by its shape, two with a probability valley across it:

    >>> bar = np.zeros((1, 7, 24), bool); bar[0, 1:6, 1:23] = True
    >>> p = np.where(np.abs(np.arange(24) - 12) < 2, 0.5, 1.0) * bar
    >>> kw = dict(spacing=(10, 10, 10), min_depth_nm=5, structure=np.ones((3, 3, 3), bool))
    >>> int(split_touching(bar, **kw).max())
    1
    >>> int(split_touching(bar, probability=p, valley_probability=0.9, **kw).max())
    2
    """
    distance = ndimage.distance_transform_edt(mask, sampling=spacing)
    tie = tie_breaker(mask.shape, origin)
    height = distance + tie
    seeds = split_seeds(height, min_depth_nm=min_depth_nm, structure=structure)
    if probability is not None and valley_probability is not None:
        valley = valley_height(distance, probability, valley_probability=valley_probability) + tie
        seeds = valley_seeds(
            valley, height, seeds, mask=mask, min_depth_nm=min_depth_nm, structure=structure
        )
        height = valley
    if seeds.max() <= 1:
        return mask.astype(np.int32)
    pieces = watershed(-height, seeds, mask=mask, connectivity=structure)
    pieces = absorb_small_pieces(
        pieces,
        seeds,
        height,
        mask=mask,
        structure=structure,
        voxel_nm3=float(np.prod(spacing)),
        min_volume_um3=min_volume_um3,
    )
    # number the pieces in raster order of their first voxel, as the objects are numbered
    ids, first = np.unique(pieces.ravel(), return_index=True)
    ids, first = ids[ids > 0], first[ids > 0]
    lut = np.zeros(int(pieces.max()) + 1, np.int32)
    lut[ids[np.argsort(first, kind="stable")]] = np.arange(1, len(ids) + 1, dtype=np.int32)
    return lut[pieces]
