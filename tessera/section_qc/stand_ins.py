"""Sections that stand in for the excluded ones wherever a model reads the sections around.

A section QC excluded (blank, torn, badly blurred, lost) holds no image of the tissue. A model
that reads the sections around its own (``neighbours``, ``context_sections`` or the 3D filter
bank) would read that damage into the sections next to it: measured on the demo with
``neighbours: 1``, the mitochondria of the two sections beside a blank one dropped from a
probability of about 0.87 to below 0.1, and objects crossing them fell apart. So every read of
a section goes through :func:`stand_in_sections`: an excluded section is read as the nearest
kept section (the earlier one on a tie), the others as themselves. The stored image is never
changed; training, tile prediction and whole-volume prediction read through the same rule.
"""

import numpy as np

from tessera.errors import TesseraInputError

__all__ = ["SectionStandIns", "stand_in_pairs", "stand_in_sections", "through_stand_ins"]


def stand_in_sections(n_sections, excluded):
    """For each of `n_sections` sections, the section read in its place.

    Parameters
    ----------
    n_sections : int
        Sections of the volume.
    excluded : sequence of int
        Sections QC excluded (0-based); out-of-range values are refused.

    Returns
    -------
    ndarray of int64
        ``out[z]`` is z for a kept section and the nearest kept section (the earlier one on a
        tie) for an excluded one. When every section is excluded there is nothing to stand in
        and each section is read as itself.

    Examples
    --------
    >>> stand_in_sections(7, [0, 3, 5, 6]).tolist()
    [1, 1, 2, 2, 4, 4, 4]
    >>> stand_in_sections(3, []).tolist()
    [0, 1, 2]
    """
    z = np.arange(int(n_sections))
    bad = np.zeros(z.size, bool)
    excluded = np.asarray(list(excluded), dtype=np.int64)
    if excluded.size and (excluded.min() < 0 or excluded.max() >= z.size):
        raise TesseraInputError(
            f"excluded sections {excluded.tolist()} lie outside the volume's sections "
            f"0..{z.size - 1}; expected the section QC table of this stack"
        )
    bad[excluded] = True
    kept = z[~bad]
    if not kept.size or not bad.any():
        return z
    # nearest kept section: the kept one just below or just above, the earlier on a tie
    above = np.searchsorted(kept, z)
    below = np.clip(above - 1, 0, kept.size - 1)
    above = np.clip(above, 0, kept.size - 1)
    earlier, later = kept[below], kept[above]
    nearest = np.where(np.abs(z - earlier) <= np.abs(later - z), earlier, later)
    return np.where(bad, nearest, z)


class SectionStandIns:
    """A (Z, Y, X) array whose sections are read through a stand-in index.

    Reads take boxes (a tuple of slices), as every window of the cascade does; the sections a
    box needs are read from the underlying array (numpy or zarr) in one bounding box.

    Parameters
    ----------
    array : array-like
        The volume (``shape``, ``dtype`` and slicing).
    stand_ins : sequence of int
        ``stand_ins[z]``: the section read for z (:func:`stand_in_sections`).

    Examples
    --------
    >>> a = np.arange(4).reshape(4, 1, 1)
    >>> v = SectionStandIns(a, stand_in_sections(4, [2]))
    >>> v[0:4, :, :].ravel().tolist(), v.shape
    ([0, 1, 1, 3], (4, 1, 1))
    """

    def __init__(self, array, stand_ins):
        self.array = array
        self.stand_ins = np.asarray(stand_ins, dtype=np.int64)
        if self.stand_ins.shape != (array.shape[0],):
            raise TesseraInputError(
                f"{self.stand_ins.size} stand-ins for a volume of {array.shape[0]} sections"
            )
        self.shape = tuple(array.shape)
        self.dtype = array.dtype
        self.ndim = 3

    def __getitem__(self, box):
        if not (
            isinstance(box, tuple) and len(box) == 3 and all(isinstance(b, slice) for b in box)
        ):
            raise TypeError("read a box of three slices (z, y, x)")
        z = self.stand_ins[box[0]]
        if not z.size:
            return np.asarray(self.array[box])
        lo, hi = int(z.min()), int(z.max()) + 1
        block = np.asarray(self.array[(slice(lo, hi), box[1], box[2])])
        if z.size == hi - lo and bool(np.all(np.diff(z) == 1)):
            return block
        return block[z - lo]


def stand_in_pairs(n_sections, excluded):
    """``[[z, stand-in], ...]`` for the excluded sections only: plain values for a record.

    Examples
    --------
    >>> stand_in_pairs(5, [2, 4])
    [[2, 1], [4, 3]]
    """
    index = stand_in_sections(n_sections, excluded)
    return [[int(z), int(index[z])] for z in np.flatnonzero(index != np.arange(index.size))]


def through_stand_ins(array, pairs):
    """`array` read through `pairs` (:func:`stand_in_pairs`); the array itself when empty.

    Examples
    --------
    >>> a = np.arange(3).reshape(3, 1, 1)
    >>> through_stand_ins(a, []) is a, through_stand_ins(a, [[0, 1]])[0:3, :, :].ravel().tolist()
    (True, [1, 1, 2])
    """
    if not pairs:
        return array
    index = np.arange(array.shape[0])
    for z, stand_in in pairs:
        index[int(z)] = int(stand_in)
    return SectionStandIns(array, index)
