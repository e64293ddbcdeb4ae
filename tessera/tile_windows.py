"""A tile's image window: the tile's sections with a halo around it, mirrored beyond the volume."""

from tessera.cascade.api import mirrored_stack


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
