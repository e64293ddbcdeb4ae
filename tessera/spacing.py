"""The one voxel-spacing convention of the project.

Spacing is given per array axis, in axis order (z, y, x for volumes), in nanometres, as a tuple
of positive finite floats. A scalar means isotropic spacing.
"""

import math

import numpy as np

from tessera.errors import TesseraInputError


def normalize_spacing(spacing, ndim, *, name="spacing"):
    """Return `spacing` as a tuple of `ndim` positive finite floats.

    Parameters
    ----------
    spacing : float or sequence of float
        One value for all axes, or one per axis in array-axis order.
    ndim : int
        Number of array axes.
    name : str, optional
        Parameter name used in error messages.

    Returns
    -------
    tuple of float

    Raises
    ------
    TesseraInputError
        If the length does not match `ndim` or a value is not positive and finite.

    Examples
    --------
    >>> normalize_spacing(8, 2)
    (8.0, 8.0)
    >>> normalize_spacing([40, 8, 8], 3)
    (40.0, 8.0, 8.0)
    """
    if np.isscalar(spacing):
        values = [spacing] * ndim
    else:
        values = list(spacing)
        if len(values) != ndim:
            raise TesseraInputError(
                f"{name} must have one value per axis ({ndim}), got {len(values)}: {values!r}"
            )
    out = []
    for v in values:
        try:
            f = float(v)
        except (TypeError, ValueError):
            raise TesseraInputError(f"{name} values must be numbers, got {v!r}") from None
        if not math.isfinite(f) or f <= 0:
            raise TesseraInputError(f"{name} values must be positive and finite, got {v!r}")
        out.append(f)
    return tuple(out)
