"""Tiles for people to paint: where a tile around a point lies, its contrast-stretched preview,
and a painted mask checked and converted to label values."""

import numpy as np
import pandas as pd

from tessera.errors import TesseraInputError
from tessera.label_values import BACKGROUND, IGNORE, TARGET
from tessera.tiles.checks import as_int, check_factors
from tessera.tiles.registry import validate_registry

__all__ = ["contrast_preview", "painted_to_labels", "tiles_around_points"]

#: Pixel values a painter gives the target in a mask file: 1 (a 0/1 mask) or 8-bit white. They
#: are pixel values of the painted file, not label values; a deeper file may also use its white.
_PAINTED_TARGET = (1, 255)
_WHITE_8BIT = 255


def tiles_around_points(level_array, points, *, level, factors, size):
    """The registry of one square tile around every point, at a pyramid level.

    Parameters
    ----------
    level_array : zarr.Array or ndarray
        ``(P, M, N)`` uint8 image at the working level (z, y, x); only its shape and dtype are
        looked at.
    points : pandas.DataFrame
        From :func:`tessera.workflow.files.points.read_points`, all of one dataset (the one
        `level_array` belongs to); ``attrs["source"]`` names the sheet in error messages.
    level : int
        Index of the working level, recorded in the registry.
    factors : sequence of 3 int
        Reduction of that level relative to level 0 (z, y, x).
    size : int
        Tile side in pixels at the working level, used where the sheet gives none.

    Returns
    -------
    pandas.DataFrame
        The registry (source ``"painted"``), one row per point in sheet order.

    Notes
    -----
    A point at level-0 ``(z, y, x)`` maps to ``(z // fz, y // fy, x // fx)``; its tile covers
    rows ``y // fy - size // 2`` to ``y // fy - size // 2 + size - 1`` (columns likewise). A tile
    reaching outside the image is an error naming the row, never shifted silently: moving it
    would change what the user chose.

    Examples
    --------
    >>> img = np.zeros((2, 8, 8), dtype=np.uint8)
    >>> pts = pd.DataFrame({"tile_id": ["a"], "dataset": ["d"], "target": ["m"], "z": [1],
    ...                     "y": [8], "x": [8], "size": [0]}, index=[1])
    >>> reg = tiles_around_points(img, pts, level=1, factors=(1, 2, 2), size=4)
    >>> reg.loc[0, ["z", "y0", "x0", "height"]].tolist()
    [1, 2, 2, 4]
    """
    level = as_int(level, low=0, where="level", source=None)
    factors = check_factors(factors)
    size = as_int(size, low=1, where="size", source=None)
    if not isinstance(points, pd.DataFrame):
        raise TesseraInputError(
            f"points must be a table from read_points, got {type(points).__name__}"
        )
    where_sheet = points.attrs.get("source", "points")
    needed = ["tile_id", "dataset", "target", "z", "y", "x"]
    if any(c not in points.columns for c in needed) or len(points) == 0:
        raise TesseraInputError(
            f"points need columns {needed} and at least one row", source=where_sheet
        )
    if points["dataset"].nunique() != 1:
        raise TesseraInputError(
            f"points of several datasets {sorted(points['dataset'].unique())}; export one "
            "dataset at a time (filter the points first)",
            source=where_sheet,
        )
    shape = tuple(int(s) for s in level_array.shape)
    if len(shape) != 3:
        raise TesseraInputError(f"expected a 3D (z, y, x) image, got shape {shape}")
    if np.dtype(level_array.dtype) != np.uint8:
        raise TesseraInputError(f"expected a uint8 image level, got {level_array.dtype}")
    rows = []
    for idx, p in points.iterrows():
        side = int(p["size"]) if "size" in points.columns and int(p["size"]) > 0 else size
        rows.append(_tile_around(idx, p, side, shape, level, factors, where_sheet))
    return validate_registry(pd.DataFrame(rows), source=where_sheet)


def _tile_around(idx, p, side, shape, level, factors, where_sheet):
    """The registry row of the `side` x `side` tile around point `p` (sheet row `idx`)."""
    fz, fy, fx = factors
    z, yc, xc = int(p["z"]) // fz, int(p["y"]) // fy, int(p["x"]) // fx
    y0, x0 = yc - side // 2, xc - side // 2
    where = f"row {idx} (tile {p['tile_id']!r})"
    if not 0 <= z < shape[0]:
        raise TesseraInputError(
            f"{where}: section z={p['z']} lies beyond the stack (level-{level} section {z}; the "
            f"image has {shape[0]} sections at level {level}, {shape[0] * fz} at most at full "
            "resolution); expected a section of the stack, numbered from 0",
            source=where_sheet,
        )
    if side > min(shape[1:]):
        raise TesseraInputError(
            f"{where}: a tile of {side} x {side} px is larger than the level-{level} sections "
            f"({shape[1]} x {shape[2]} px); tile sizes count pixels of the working level "
            f"(downsample): set the row's size, or the target's tiles.size, to at most "
            f"{min(shape[1:])}",
            source=where_sheet,
        )
    if not (y0 >= 0 and x0 >= 0 and y0 + side <= shape[1] and x0 + side <= shape[2]):
        raise TesseraInputError(
            f"{where}: the {side} x {side} tile around level-0 "
            f"point z={p['z']}, y={p['y']}, x={p['x']} covers level-{level} z={z}, rows "
            f"{y0}..{y0 + side - 1}, columns {x0}..{x0 + side - 1}, outside the image of "
            f"shape {shape}; move the point at least {side // 2} pixels (level {level}) "
            "from the edge or use a smaller size",
            source=where_sheet,
        )
    return {
        "tile_id": p["tile_id"],
        "dataset": p["dataset"],
        "target": p["target"],
        "level": level,
        "z": z,
        "y0": y0,
        "x0": x0,
        "height": side,
        "width": side,
        "source": "painted",
    }


def contrast_preview(tile):
    """Stretch the 1st-99th percentile range to 0-255 (uint8); flat tiles stay as they are.

    Examples
    --------
    >>> contrast_preview(np.array([[10, 20], [30, 40]], dtype=np.uint8))
    array([[  0,  84],
           [171, 255]], dtype=uint8)
    """
    lo, hi = np.percentile(tile, [1.0, 99.0])
    if hi <= lo:
        return tile.astype(np.uint8)
    scaled = (tile.astype(np.float32) - np.float32(lo)) * np.float32(255.0 / (hi - lo))
    return np.clip(np.rint(scaled), 0, 255).astype(np.uint8)


def painted_to_labels(array, *, shape, ignore_value=None, allow_single_class=False, source=None):
    """Check the pixels of one painted mask and return them as a uint8 label image.

    Parameters
    ----------
    array : ndarray
        The mask's pixels as read: 8- or 16-bit (or 1-bit, bool) greyscale; RGB(A) or LA pixels
        are accepted when every pixel is grey (equal colour channels) and fully opaque.
    shape : (int, int)
        Expected ``(height, width)``.
    ignore_value : int, optional
        Pixel value marking unsure pixels; mapped to ignore (:mod:`tessera.label_values`).
    allow_single_class : bool, optional
        Accept a mask with only background or only target pixels.
    source : str or Path, optional
        The mask file, named in error messages.

    Returns
    -------
    ndarray of uint8
        Background, target and ignore values of :mod:`tessera.label_values`.

    Notes
    -----
    0 is background. The target is one non-zero value other than `ignore_value`: 1, 255, or
    65535 in a 16-bit file. Any other value is an error that lists the unexpected values.

    Examples
    --------
    >>> painted_to_labels(np.array([[0, 255], [128, 0]], dtype=np.uint8), shape=(2, 2),
    ...                   ignore_value=128).tolist()
    [[0, 1], [255, 0]]
    """
    shape = tuple(int(s) for s in shape)
    if ignore_value is not None:
        ignore_value = as_int(ignore_value, low=1, where="ignore_value", source=None)
    array = _to_grey(array, source=source)
    if array.shape != shape:
        raise TesseraInputError(
            f"expected a mask of shape {shape} (rows, columns), got {array.shape}", source=source
        )
    if array.dtype == bool:
        array = array.astype(np.uint8)
    if not np.issubdtype(array.dtype, np.integer):
        raise TesseraInputError(
            f"expected integer pixels (8- or 16-bit), got {array.dtype}", source=source
        )
    values = [int(v) for v in np.unique(array)]
    full = int(np.iinfo(array.dtype).max)
    candidates = set(_PAINTED_TARGET) | ({full} if full > _WHITE_8BIT else set())
    rest = [v for v in values if v != 0 and v != ignore_value]
    allowed_text = f"0 (background) and one target value of {sorted(candidates)}" + (
        "" if ignore_value is None else f", plus {ignore_value} (ignore)"
    )
    unexpected = [v for v in rest if v not in candidates]
    if unexpected or len(rest) > 1:
        bad = unexpected if unexpected else rest
        raise TesseraInputError(
            f"unexpected values {bad}; expected {allowed_text}{_values_hint(bad, ignore_value)}",
            source=source,
        )
    out = np.zeros(shape, dtype=np.uint8)
    if rest:
        out[array == rest[0]] = TARGET
    if ignore_value is not None:
        out[array == ignore_value] = IGNORE
    if not allow_single_class:
        _check_both_classes(out, source=source)
    return out


#: More stray grey levels than this in a mask point to a lossy save or a soft brush.
_FEW_VALUES = 3


def _values_hint(bad, ignore_value):
    """What the unexpected values of a mask most likely are, and the fix."""
    if len(bad) > _FEW_VALUES:
        return (
            "; many grey levels: saved with lossy compression (JPEG) or painted with a soft, "
            "anti-aliased brush? paint with a hard-edged brush and save as PNG"
        )
    if ignore_value is None:
        return "; if one of them marks unsure pixels, give it as the ignore value (ignore_value)"
    return ""


def _check_both_classes(labels, *, source):
    has_bg = bool((labels == BACKGROUND).any())
    has_fg = bool((labels == TARGET).any())
    if not (has_bg and has_fg):
        what = (
            "no target pixels"
            if has_bg
            else ("no background pixels" if has_fg else "neither target nor background")
        )
        raise TesseraInputError(
            f"the mask has {what}; a painted tile needs both classes (paint every target "
            "pixel, leave background at 0) unless single-class tiles are allowed "
            "(allow_single_class)",
            source=source,
        )


def _to_grey(array, *, source):
    """Collapse grey RGB(A) / LA pixels to one channel; leading singleton axes are dropped."""
    while array.ndim > 2 and array.shape[0] == 1:
        array = array[0]
    if array.ndim == 3 and array.shape[-1] in (2, 3, 4):
        colour = array[..., :3] if array.shape[-1] >= 3 else array[..., :1]
        alpha = array[..., -1] if array.shape[-1] in (2, 4) else None
        if not (colour == colour[..., :1]).all():
            raise TesseraInputError(
                "colour pixels found; save the mask as greyscale (or with equal red, green and "
                "blue values)",
                source=source,
            )
        if alpha is not None and not (alpha == np.iinfo(alpha.dtype).max).all():
            raise TesseraInputError(
                "transparent pixels found; flatten the image (no alpha) before saving",
                source=source,
            )
        array = colour[..., 0]
    if array.ndim != 2:
        raise TesseraInputError(
            f"expected a single 2D greyscale image, got shape {array.shape}", source=source
        )
    return array
