"""Checks of the plain values tile tables hold: blanks, whole numbers, factors, tile ids."""

import re

import numpy as np

from tessera.errors import TesseraInputError

__all__ = ["TILE_ID", "as_int", "check_factors", "is_blank", "safe_tile_id"]

#: A tile id names files (``<tile_id>.png``), so it holds no path separators or dots.
TILE_ID = re.compile(r"[A-Za-z0-9_-]+")
_NOT_TILE_ID = re.compile(r"[^A-Za-z0-9_-]")
_INTEGER_TEXT = re.compile(r"[+]?[0-9]+")


def is_blank(value):
    """Whether a table cell is empty: None, NaN or whitespace-only text.

    Examples
    --------
    >>> is_blank(float("nan")), is_blank("  "), is_blank("0"), is_blank(0)
    (True, True, False, False)
    """
    if value is None:
        return True
    if isinstance(value, float) and np.isnan(value):
        return True
    return isinstance(value, str) and not value.strip()


def as_int(value, *, low, where, source):
    """An integer >= low from an int or integer text; anything else is an error.

    Parameters
    ----------
    value : int or str
        A Python or numpy integer, or text of digits (an optional ``+``, surrounding spaces).
        Booleans, floats and anything else are refused.
    low : int
        Smallest value accepted.
    where : str
        What the value is (``"row 2, column 'z'"``), named in the error message.
    source : str or Path or None
        File the value came from, named in the error message.

    Returns
    -------
    int

    Raises
    ------
    TesseraInputError
        ``<where>: expected a whole number >= <low>, got <value>``.

    Examples
    --------
    >>> as_int(" 12 ", low=0, where="z", source=None)
    12
    >>> as_int("1.5", low=0, where="z", source=None)
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: z: expected a whole number >= 0, got '1.5'
    """
    if isinstance(value, (bool, np.bool_)):
        ok = False
    elif isinstance(value, (int, np.integer)):
        ok, number = True, int(value)
    elif isinstance(value, str) and _INTEGER_TEXT.fullmatch(value.strip()):
        ok, number = True, int(value.strip())
    else:
        ok = False
    if not ok:
        raise TesseraInputError(
            f"{where}: expected a whole number >= {low}, got {value!r}", source=source
        )
    if number < low:
        raise TesseraInputError(
            f"{where}: expected a whole number >= {low}, got {number}", source=source
        )
    return number


def check_factors(factors):
    """Pyramid reduction factors (z, y, x) as a tuple of three ints >= 1.

    Examples
    --------
    >>> check_factors([1, 2.0, 2])
    (1, 2, 2)
    """
    try:
        out = tuple(int(f) for f in factors)
        ok = len(out) == 3 and all(int(f) == f for f in factors) and min(out) >= 1
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise TesseraInputError(
            f"factors must be three whole numbers >= 1 (z, y, x), got {factors!r}"
        )
    return out


def safe_tile_id(text):
    """`text` with every character a tile id may not hold replaced by ``-``.

    Examples
    --------
    >>> safe_tile_id("d 1-mito.v2-z4")
    'd-1-mito-v2-z4'
    """
    return _NOT_TILE_ID.sub("-", text)
