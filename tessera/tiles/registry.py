"""The tile registry: one row per annotation tile, its columns checked, and a tile's place in
its level array.

Registry columns:

=========== ====== ==========================================================================
tile_id     str    ``[A-Za-z0-9_-]+``, unique; names the label file
dataset     str    dataset the tile was cut from
target      str    organelle class painted in the tile
level       int    pyramid level the tile lives at (the target's working level)
z           int    section index in that level's z grid
y0, x0      int    first row and column of the tile in that level's voxel grid
height      int    rows of the tile
width       int    columns of the tile
source      str    ``"painted"`` (a person painted it) or ``"labels"`` (cut from a label volume)
role        str    optional: ``"train"``, ``"validation"``, ``"test"`` or ``"guard"``
=========== ====== ==========================================================================

Each tile has a ``(height, width)`` uint8 label image holding the values of
:mod:`tessera.label_values` (background, target, ignore).
"""

import numpy as np
import pandas as pd

from tessera.errors import TesseraInputError
from tessera.label_values import BACKGROUND, IGNORE, TARGET
from tessera.tiles.checks import TILE_ID, as_int, is_blank

__all__ = [
    "REGISTRY_COLUMNS",
    "ROLES",
    "check_label_images",
    "tile_slices",
    "unexpected_label_values",
    "validate_registry",
]

#: Registry columns, in file order (``role`` follows when the set has been split).
REGISTRY_COLUMNS = (
    "tile_id",
    "dataset",
    "target",
    "level",
    "z",
    "y0",
    "x0",
    "height",
    "width",
    "source",
)

#: Roles given by :func:`tessera.tiles.split.split_tiles`; ``guard`` tiles are used for nothing.
ROLES = ("train", "validation", "test", "guard")

_INT_COLUMNS = ("level", "z", "y0", "x0", "height", "width")
_SOURCES = ("painted", "labels")


def validate_registry(registry, *, source=None):
    """Check a registry and return a copy with canonical column order and dtypes.

    Parameters
    ----------
    registry : pandas.DataFrame
        One row per tile with the columns of :data:`REGISTRY_COLUMNS` (and optionally
        ``role``). Values may be text (as read from a TSV) or numbers.
    source : str or Path, optional
        File the registry came from, named in error messages.

    Returns
    -------
    pandas.DataFrame
        Columns in :data:`REGISTRY_COLUMNS` order (``role`` last if present); integer columns
        as int64, text columns as str; a fresh 0..n-1 index.

    Raises
    ------
    TesseraInputError
        On a missing or unknown column, an empty table, a duplicate or malformed ``tile_id``,
        a non-integer or negative position, a non-positive size, or an unknown source or role.
        Rows are numbered from 1 (the first line below the header).

    Examples
    --------
    >>> reg = pd.DataFrame({"tile_id": ["a1"], "dataset": ["d"], "target": ["mito"],
    ...                     "level": ["1"], "z": ["3"], "y0": ["0"], "x0": ["8"],
    ...                     "height": ["4"], "width": ["4"], "source": ["painted"]})
    >>> validate_registry(reg).loc[0, "x0"] + 1
    np.int64(9)
    """
    if not isinstance(registry, pd.DataFrame):
        raise TesseraInputError(
            f"expected a registry table (pandas DataFrame), got {type(registry).__name__}",
            source=source,
        )
    columns = list(registry.columns)
    missing = [c for c in REGISTRY_COLUMNS if c not in columns]
    allowed = set(REGISTRY_COLUMNS) | {"role"}
    unknown = [c for c in columns if c not in allowed]
    if missing or unknown:
        raise TesseraInputError(
            f"registry columns must be {list(REGISTRY_COLUMNS)} (+ optional 'role'); "
            f"missing {missing}, unknown {unknown}",
            source=source,
        )
    if len(registry) == 0:
        raise TesseraInputError("the registry has no tiles", source=source)
    rows = registry.reset_index(drop=True)
    text = ("tile_id", "dataset", "target", "source") + (("role",) if "role" in columns else ())
    out = _text_columns(rows, text, source=source)
    for name in _INT_COLUMNS:
        low = 1 if name in ("height", "width") else 0
        out[name] = [
            as_int(v, low=low, where=f"row {i + 1}, column {name!r}", source=source)
            for i, v in enumerate(rows[name])
        ]
    order = list(REGISTRY_COLUMNS) + (["role"] if "role" in columns else [])
    table = pd.DataFrame({c: out[c] for c in order})
    for name in _INT_COLUMNS:
        table[name] = table[name].astype(np.int64)
    return table


def _text_columns(rows, names, *, source):
    """The text columns `names` of `rows` as stripped lists, checked: no blanks, well-formed
    unique tile ids, known sources and roles."""
    out = {}
    for name in names:
        values = []
        for i, v in enumerate(rows[name]):
            text = "" if is_blank(v) else str(v).strip()
            if not text:
                raise TesseraInputError(
                    f"row {i + 1}, column {name!r}: empty; expected text", source=source
                )
            values.append(text)
        out[name] = values
    for i, tid in enumerate(out["tile_id"]):
        if not TILE_ID.fullmatch(tid):
            raise TesseraInputError(
                f"row {i + 1}, column 'tile_id': {tid!r} must match [A-Za-z0-9_-]+", source=source
            )
    dupes = sorted({t for t in out["tile_id"] if out["tile_id"].count(t) > 1})
    if dupes:
        raise TesseraInputError(
            f"duplicate tile_id values {dupes}; every tile needs its own id", source=source
        )
    for i, s in enumerate(out["source"]):
        if s not in _SOURCES:
            raise TesseraInputError(
                f"row {i + 1}, column 'source': {s!r}; expected one of {list(_SOURCES)}",
                source=source,
            )
    for i, r in enumerate(out.get("role", ())):
        if r not in ROLES:
            raise TesseraInputError(
                f"row {i + 1}, column 'role': {r!r}; expected one of {list(ROLES)}", source=source
            )
    return out


def unexpected_label_values(array):
    """The values of a label image that are not background, target or ignore, sorted.

    Examples
    --------
    >>> unexpected_label_values(np.array([[0, 1, IGNORE], [7, 1, 2]], dtype=np.uint8)).tolist()
    [2, 7]
    """
    return np.setdiff1d(np.unique(array), [BACKGROUND, TARGET, IGNORE])


def check_label_images(registry, labels):
    """Check one label image per registry row: uint8, the tile's shape, only label values.

    Parameters
    ----------
    registry : pandas.DataFrame
        From :func:`validate_registry`.
    labels : dict of str to ndarray
        ``tile_id -> (height, width)`` uint8 array of the values of :mod:`tessera.label_values`,
        for every registry row (extra entries are an error too).

    Returns
    -------
    dict of str to ndarray
        The label images as arrays, in registry order.

    Examples
    --------
    >>> reg = validate_registry(pd.DataFrame({"tile_id": ["t1"], "dataset": ["d"],
    ...     "target": ["m"], "level": [0], "z": [0], "y0": [0], "x0": [0], "height": [1],
    ...     "width": [2], "source": ["labels"]}))
    >>> check_label_images(reg, {"t1": np.array([[0, 1]], dtype=np.uint8)})["t1"].tolist()
    [[0, 1]]
    """
    if not isinstance(labels, dict):
        raise TesseraInputError(
            f"labels must be a dict tile_id -> array, got {type(labels).__name__}"
        )
    extra = sorted(set(labels) - set(registry["tile_id"]))
    if extra:
        raise TesseraInputError(f"labels for tiles not in the registry: {extra}")
    checked = {}
    for row in registry.itertuples(index=False):
        if row.tile_id not in labels:
            raise TesseraInputError(f"no label image for tile {row.tile_id!r}")
        array = np.asarray(labels[row.tile_id])
        if array.dtype != np.uint8 or array.shape != (row.height, row.width):
            raise TesseraInputError(
                f"label image of tile {row.tile_id!r}: expected uint8 of shape "
                f"({row.height}, {row.width}), got {array.dtype} of shape {array.shape}"
            )
        unexpected = unexpected_label_values(array)
        if unexpected.size:
            raise TesseraInputError(
                f"label image of tile {row.tile_id!r}: unexpected values "
                f"{unexpected.tolist()}; expected {BACKGROUND}, {TARGET} and {IGNORE}"
            )
        checked[row.tile_id] = array
    return checked


def tile_slices(row, *, halo=0, shape=None):
    """Index of a registry tile in its level array, widened by a halo for filter context.

    Parameters
    ----------
    row : mapping or namedtuple
        A registry row (``z``, ``y0``, ``x0``, ``height``, ``width``).
    halo : int, optional
        Extra pixels wanted on every in-plane side.
    shape : sequence of int, optional
        Shape of the level array, ``(P, M, N)`` or ``(M, N)``; the halo is clipped to it. Without
        it only the lower edges (0) are known.

    Returns
    -------
    index : (int, slice, slice)
        ``level_array[index]`` is the tile plus the part of the halo inside the image.
    pad : ((int, int), (int, int))
        Halo rows before/after and columns before/after that fall outside the image; pad the
        read block with ``numpy.pad(block, pad, mode="reflect")`` to get the full
        ``(height + 2 halo, width + 2 halo)`` block.

    Examples
    --------
    >>> tile_slices({"z": 2, "y0": 1, "x0": 10, "height": 4, "width": 4}, halo=3,
    ...             shape=(5, 20, 16))
    ((2, slice(0, 8, None), slice(7, 16, None)), ((2, 0), (0, 1)))
    """
    get = row.get if hasattr(row, "get") else (lambda k: getattr(row, k))
    try:
        z, y0, x0, h, w = (
            as_int(get(k), low=0, where=k, source=None)
            for k in ("z", "y0", "x0", "height", "width")
        )
    except (AttributeError, KeyError):
        raise TesseraInputError("a tile row needs z, y0, x0, height and width") from None
    halo = as_int(halo, low=0, where="halo", source=None)
    ny = nx = None
    if shape is not None:
        shape = tuple(int(s) for s in shape)
        if len(shape) == 3:
            if z >= shape[0]:
                raise TesseraInputError(f"tile section z={z} is outside the image of shape {shape}")
            shape = shape[1:]
        ny, nx = shape
        if y0 + h > ny or x0 + w > nx:
            raise TesseraInputError(
                f"tile rows {y0}..{y0 + h - 1}, columns {x0}..{x0 + w - 1} "
                f"reach outside the section of shape {shape}"
            )
    ya, xa = y0 - halo, x0 - halo
    yb, xb = y0 + h + halo, x0 + w + halo
    pad_y = (max(0, -ya), 0 if ny is None else max(0, yb - ny))
    pad_x = (max(0, -xa), 0 if nx is None else max(0, xb - nx))
    sy = slice(max(ya, 0), yb if ny is None else min(yb, ny))
    sx = slice(max(xa, 0), xb if nx is None else min(xb, nx))
    return (z, sy, sx), (pad_y, pad_x)
