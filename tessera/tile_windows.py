"""A tile's image window: the tile's sections with a halo around it, mirrored beyond the volume."""

from tessera.cascade.api import mirrored_stack, volume_room


def tile_window(level_array, row, halo, sections):
    """A tile's image (sections z ± `sections`) with `halo` pixels around it.

    Parameters
    ----------
    level_array : array_like
        (Z, Y, X) image at the tile's working level (a zarr array is read window by window).
    row : mapping
        The tile's registry row: ``z``, ``y0``, ``x0``, ``height``, ``width``.
    halo : int
        Pixels added on every in-plane side, mirrored beyond the volume.
    sections : int
        Sections taken above and below the tile's own (the cascade's
        :func:`tessera.cascade.api.z_halo`), mirrored beyond the first and last section.

    Returns
    -------
    ndarray
        (2 * sections + 1, height + 2 * halo, width + 2 * halo).

    Examples
    --------
    >>> import numpy as np
    >>> volume = np.arange(2 * 4 * 4).reshape(2, 4, 4)
    >>> row = {"z": 1, "y0": 1, "x0": 2, "height": 2, "width": 2}
    >>> tile_window(volume, row, 0, 0)[0].tolist()
    [[22, 23], [26, 27]]
    >>> tile_window(volume, row, 1, 0).shape
    (1, 4, 4)
    """
    z, y0, x0 = int(row["z"]), int(row["y0"]), int(row["x0"])
    h, w = int(row["height"]), int(row["width"])
    return mirrored_stack(
        level_array, z, sections, y0 - halo, y0 + h + halo, x0 - halo, x0 + w + halo
    )


def tile_room(spec, level_array, row):
    """Where the volume ends around a tile (:func:`tessera.cascade.api.volume_room`), so that
    its maps are mirrored beyond the volume's edges as a prediction block's are.

    Examples
    --------
    >>> import numpy as np
    >>> from tessera.cascade.api import CascadeSpec
    >>> row = {"z": 0, "y0": 4, "x0": 0, "height": 8, "width": 8}
    >>> tile_room(CascadeSpec(levels=2), np.zeros((1, 20, 8)), row)
    (4, 8, 0, 0)
    """
    y0, x0 = int(row["y0"]), int(row["x0"])
    h, w = int(row["height"]), int(row["width"])
    return volume_room(spec, level_array.shape[1:], (y0, y0 + h, x0, x0 + w))
