"""Checks of the generator's options: one clear line per bad value (``TesseraInputError``)."""

import math

import numpy as np

from tessera.errors import TesseraInputError

__all__ = ["MIN_SHAPE", "check_int", "check_scale", "check_seed", "check_shape"]

#: Smallest volume (z, y, x voxels) the generator can lay out cells, defects and tiles in.
MIN_SHAPE = (8, 64, 64)


def check_int(value, name, *, low):
    """Return `value` as an int if it is an integer (not a bool) of at least `low`.

    Parameters
    ----------
    value : object
        The option's value.
    name : str
        The option's name, for the message.
    low : int
        Smallest allowed value.

    Returns
    -------
    int

    Raises
    ------
    TesseraInputError
        If `value` is not an integer or is below `low`.

    Examples
    --------
    >>> check_int(np.int64(5), "tile_size", low=1)
    5
    >>> check_int(True, "tile_size", low=1)
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: tile_size must be an integer >= 1, got True
    """
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise TesseraInputError(f"{name} must be an integer >= {low}, got {value!r}")
    if value < low:
        raise TesseraInputError(f"{name} must be an integer >= {low}, got {value!r}")
    return int(value)


def check_seed(seed, *, name="seed"):
    """Return `seed` as a non-negative int.

    Examples
    --------
    >>> check_seed(0)
    0
    """
    return check_int(seed, name, low=0)


def check_shape(shape):
    """Return `shape` as a tuple of 3 ints, each at least :data:`MIN_SHAPE`.

    Examples
    --------
    >>> check_shape([8, 64, 96])
    (8, 64, 96)
    >>> check_shape((4, 64, 64))
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: shape must be at least (8, 64, 64), got (4, 64, 64)
    """
    try:
        values = tuple(shape)
    except TypeError:
        raise TesseraInputError(f"shape must be 3 integers (z, y, x), got {shape!r}") from None
    if len(values) != 3:
        raise TesseraInputError(f"shape must be 3 integers (z, y, x), got {shape!r}")
    out = tuple(check_int(v, "shape values", low=1) for v in values)
    if any(v < m for v, m in zip(out, MIN_SHAPE, strict=True)):
        raise TesseraInputError(f"shape must be at least {MIN_SHAPE}, got {out}")
    return out


def check_scale(value, *, name="mito_volume_scale"):
    """Return a volume factor as a float in [0.1, 10].

    Examples
    --------
    >>> check_scale("1.25")
    1.25
    """
    try:
        f = float(value)
    except (TypeError, ValueError):
        raise TesseraInputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(f) or not 0.1 <= f <= 10.0:
        raise TesseraInputError(f"{name} must be between 0.1 and 10, got {value!r}")
    return f
