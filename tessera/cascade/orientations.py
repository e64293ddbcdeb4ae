"""Training tiles seen in other orientations: the flips and quarter turns of the pixel grid.

The image features of the filter bank are the same in every orientation of the section (they
are built from isotropic Gaussians, gradient magnitudes and eigenvalues), but the context a node
reads at its stencil is not: a stencil sample "north" of a pixel is another sample once the tile
is turned. Training on a tile in several orientations (its image, labels and room turned
together, the context maps of the earlier nodes computed on the turned image) shows a node
organelles in every direction, as a section of tissue has them. Prediction is unchanged.

An orientation is a triple of booleans (transpose, flip rows, flip columns), applied in that
order to the last two axes; :data:`ORIENTATIONS` lists the eight of them, each set of the first
1, 2, 4 or 8 a choice of ``CascadeSpec.orientations``. Pixels are assumed square, as in almost
every EM image: a transpose of non-square pixels would show structures at another scale.
"""

import numpy as np

#: (transpose, flip rows, flip columns): identity, transpose, the two flips, the half turn and
#: the three others (quarter turns and the anti-transpose).
ORIENTATIONS = (
    (False, False, False),
    (True, False, False),
    (False, True, False),
    (False, False, True),
    (False, True, True),
    (True, True, False),
    (True, False, True),
    (True, True, True),
)
#: The numbers of orientations a cascade may train on (a prefix of ORIENTATIONS).
ORIENTATION_COUNTS = (1, 2, 4, 8)


def orient_plane(array, orientation):
    """`array` in `orientation` (of :data:`ORIENTATIONS`) over its last two axes, as a copy.

    Examples
    --------
    >>> a = np.arange(6).reshape(2, 3)
    >>> orient_plane(a, ORIENTATIONS[1]).tolist()
    [[0, 3], [1, 4], [2, 5]]
    >>> orient_plane(a, ORIENTATIONS[4]).tolist()  # the half turn
    [[5, 4, 3], [2, 1, 0]]
    """
    transpose, flip_rows, flip_columns = orientation
    out = np.asarray(array)
    if transpose:
        out = np.swapaxes(out, -2, -1)
    if flip_rows:
        out = out[..., ::-1, :]
    if flip_columns:
        out = out[..., ::-1]
    return np.ascontiguousarray(out)


def orient_room(room, orientation):
    """The room (top, bottom, left, right) of a tile turned to `orientation`, or None.

    Examples
    --------
    >>> orient_room((1, 2, 3, 4), ORIENTATIONS[1]), orient_room((1, 2, 3, 4), ORIENTATIONS[4])
    ((3, 4, 1, 2), (2, 1, 4, 3))
    """
    if room is None:
        return None
    transpose, flip_rows, flip_columns = orientation
    top, bottom, left, right = room
    if transpose:
        top, bottom, left, right = left, right, top, bottom
    if flip_rows:
        top, bottom = bottom, top
    if flip_columns:
        left, right = right, left
    return (top, bottom, left, right)
