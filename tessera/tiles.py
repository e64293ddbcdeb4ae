"""Annotation tiles: cut, paint, import, sample from label volumes, and split by section.

An *annotation set* is a table with one row per tile (the *registry*) plus one label image per
tile. Registry columns:

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

Label images are ``(height, width)`` uint8 arrays with 0 = background, 1 = target and
255 = ignore (unsure pixels; left out of training and scoring).

On disk an annotation set is one directory, written as a whole (atomically)::

    <set>/tiles.tsv             the registry
    <set>/labels/<tile_id>.png  8-bit greyscale PNG holding 0, 1 and 255

Tiles exported for painting are another directory::

    <out>/tiles.tsv                 the registry (source "painted")
    <out>/<tile_id>.tif             the raw uint8 tile, unchanged
    <out>/<tile_id>.preview.png     the tile contrast-stretched (1st-99th percentile) for painting

Painted masks come back as ``<masks>/<tile_id>.png`` (or ``.tif`` / ``.tiff``): 0 for
background and one value (1 or 255, or 65535 in a 16-bit file) for every target pixel.
"""

import re
import zlib
from pathlib import Path

import numpy as np
import pandas as pd
import tifffile
from PIL import Image

from tessera.block_reduce import block_mean
from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.omezarr import open_image, working_level
from tessera.label_values import BACKGROUND, IGNORE, TARGET

__all__ = [
    "BACKGROUND",
    "IGNORE",
    "REGISTRY_COLUMNS",
    "ROLES",
    "TARGET",
    "export_tiles",
    "import_painted",
    "labels_to_target_mask",
    "read_annotation_set",
    "read_painted_mask",
    "read_points",
    "read_registry",
    "sample_tiles_from_labels",
    "split_tiles",
    "tile_slices",
    "validate_registry",
    "write_annotation_set",
    "write_split",
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

#: Roles given by :func:`split_tiles`; ``guard`` tiles are used for nothing.
ROLES = ("train", "validation", "test", "guard")

_INT_COLUMNS = ("level", "z", "y0", "x0", "height", "width")
_SOURCES = ("painted", "labels")
_TILE_ID = re.compile(r"[A-Za-z0-9_-]+")
_INTEGER_TEXT = re.compile(r"[+]?[0-9]+")
_POINT_COLUMNS = ("dataset", "target", "z", "y", "x")
_POINT_OPTIONAL = ("tile_id", "size")
_MASK_SUFFIXES = (".png", ".tif", ".tiff")
_REGISTRY_FILE = "tiles.tsv"
_LABELS_DIR = "labels"


# ---------------------------------------------------------------------------------------------
# registry and annotation sets


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
    out = {}
    rows = registry.reset_index(drop=True)
    for name in ("tile_id", "dataset", "target", "source") + (
        ("role",) if "role" in columns else ()
    ):
        values = []
        for i, v in enumerate(rows[name]):
            text = "" if _is_blank(v) else str(v).strip()
            if not text:
                raise TesseraInputError(
                    f"row {i + 1}, column {name!r}: empty; expected text", source=source
                )
            values.append(text)
        out[name] = values
    for i, tid in enumerate(out["tile_id"]):
        if not _TILE_ID.fullmatch(tid):
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
    for name in _INT_COLUMNS:
        low = 1 if name in ("height", "width") else 0
        out[name] = [
            _as_int(v, low=low, where=f"row {i + 1}, column {name!r}", source=source)
            for i, v in enumerate(rows[name])
        ]
    order = list(REGISTRY_COLUMNS) + (["role"] if "role" in columns else [])
    table = pd.DataFrame({c: out[c] for c in order})
    for name in _INT_COLUMNS:
        table[name] = table[name].astype(np.int64)
    return table


def read_registry(path):
    """Read and validate a registry TSV (``tiles.tsv`` or a split table).

    Parameters
    ----------
    path : str or Path
        Tab-separated file with a header line.

    Returns
    -------
    pandas.DataFrame
        As from :func:`validate_registry`.
    """
    path = Path(path)
    return validate_registry(_read_tsv(path), source=path)


def write_annotation_set(path, registry, labels):
    """Write an annotation set directory (``tiles.tsv`` and ``labels/<tile_id>.png``) atomically.

    Parameters
    ----------
    path : str or Path
        Directory to create; an existing one is replaced as a whole.
    registry : pandas.DataFrame
        See :func:`validate_registry`.
    labels : dict of str to ndarray
        ``tile_id -> (height, width)`` uint8 array of 0, 1 and 255, for every registry row
        (extra entries are an error too).

    Examples
    --------
    >>> import tempfile
    >>> reg = pd.DataFrame({"tile_id": ["t1"], "dataset": ["d"], "target": ["m"], "level": [0],
    ...                     "z": [0], "y0": [0], "x0": [0], "height": [2], "width": [3],
    ...                     "source": ["painted"]})
    >>> lab = {"t1": np.array([[0, 1, 255], [0, 0, 1]], dtype=np.uint8)}
    >>> d = Path(tempfile.mkdtemp()) / "set"
    >>> write_annotation_set(d, reg, lab)
    >>> read_annotation_set(d)[1]["t1"].tolist()
    [[0, 1, 255], [0, 0, 1]]
    """
    path = Path(path)
    table = validate_registry(registry, source="registry")
    checked = _check_label_dict(table, labels)
    with atomic_path(path) as tmp:
        (tmp / _LABELS_DIR).mkdir(parents=True)
        table.to_csv(tmp / _REGISTRY_FILE, sep="\t", index=False)
        for tid, array in checked.items():
            Image.fromarray(array).save(tmp / _LABELS_DIR / f"{tid}.png")


def read_annotation_set(path):
    """Read and validate an annotation set written by :func:`write_annotation_set`.

    Returns
    -------
    registry : pandas.DataFrame
    labels : dict of str to ndarray
        ``(height, width)`` uint8 arrays of 0, 1 and 255.
    """
    path = Path(path)
    table = read_registry(path / _REGISTRY_FILE)
    labels = {}
    for row in table.itertuples(index=False):
        file = path / _LABELS_DIR / f"{row.tile_id}.png"
        if not file.is_file():
            raise TesseraInputError(f"label image of tile {row.tile_id!r} is missing", source=file)
        array = _read_image(file)
        if array.dtype != np.uint8 or array.shape != (row.height, row.width):
            raise TesseraInputError(
                f"expected a {row.height} x {row.width} 8-bit greyscale image, got "
                f"{array.dtype} of shape {array.shape}",
                source=file,
            )
        unexpected = np.setdiff1d(np.unique(array), [BACKGROUND, TARGET, IGNORE])
        if unexpected.size:
            raise TesseraInputError(
                f"unexpected values {unexpected.tolist()}; a stored label image holds only "
                "0 (background), 1 (target) and 255 (ignore)",
                source=file,
            )
        labels[row.tile_id] = array
    return table, labels


# ---------------------------------------------------------------------------------------------
# points and export


def read_points(path, *, datasets, targets):
    """Read a points sheet: where to cut a tile for painting.

    Parameters
    ----------
    path : str or Path
        TSV with columns ``dataset``, ``target``, ``z``, ``y``, ``x`` (level-0 voxel
        coordinates of the tile centre) and optionally ``tile_id`` and ``size`` (tile side in
        pixels at the working level; blank = the export default).
    datasets, targets : iterable of str
        Known dataset and target names.

    Returns
    -------
    pandas.DataFrame
        Columns ``tile_id, dataset, target, z, y, x, size``; the index is the sheet row number
        (1 = first line below the header), so later errors can name the row. ``size`` is 0
        where not given. Missing tile ids become ``<dataset>-<target>-z<z>-y<y>-x<x>`` (characters
        outside ``[A-Za-z0-9_-]`` replaced by ``-``).

    Examples
    --------
    >>> import tempfile
    >>> f = Path(tempfile.mkdtemp()) / "points.tsv"
    >>> _ = f.write_text("dataset\\ttarget\\tz\\ty\\tx\\nd1\\tmito\\t4\\t100\\t200\\n")
    >>> read_points(f, datasets=["d1"], targets=["mito"]).loc[1, "tile_id"]
    'd1-mito-z4-y100-x200'
    """
    path = Path(path)
    datasets = sorted(str(d) for d in datasets)
    targets = sorted(str(t) for t in targets)
    sheet = _read_tsv(path)
    columns = list(sheet.columns)
    missing = [c for c in _POINT_COLUMNS if c not in columns]
    unknown = [c for c in columns if c not in _POINT_COLUMNS + _POINT_OPTIONAL]
    if missing or unknown:
        raise TesseraInputError(
            f"points columns must be {list(_POINT_COLUMNS)} (+ optional "
            f"{list(_POINT_OPTIONAL)}); missing {missing}, unknown {unknown}",
            source=path,
        )
    if len(sheet) == 0:
        raise TesseraInputError("the points sheet has no rows", source=path)
    records = []
    for i, row in enumerate(sheet.to_dict("records")):
        where = f"row {i + 1}"
        rec = {}
        for name, known in (("dataset", datasets), ("target", targets)):
            value = "" if _is_blank(row[name]) else str(row[name]).strip()
            if value not in known:
                raise TesseraInputError(
                    f"{where}, column {name!r}: unknown {name} {value!r}; expected one of {known}",
                    source=path,
                )
            rec[name] = value
        for name in ("z", "y", "x"):
            rec[name] = _as_int(row[name], low=0, where=f"{where}, column {name!r}", source=path)
        size = row.get("size")
        rec["size"] = (
            0
            if _is_blank(size)
            else _as_int(size, low=1, where=f"{where}, column 'size'", source=path)
        )
        tid = row.get("tile_id")
        if _is_blank(tid) or not str(tid).strip():
            tid = re.sub(
                r"[^A-Za-z0-9_-]",
                "-",
                f"{rec['dataset']}-{rec['target']}-z{rec['z']}-y{rec['y']}-x{rec['x']}",
            )
        tid = str(tid).strip()
        if not _TILE_ID.fullmatch(tid):
            raise TesseraInputError(
                f"{where}, column 'tile_id': {tid!r} must match [A-Za-z0-9_-]+", source=path
            )
        rec["tile_id"] = tid
        records.append(rec)
    table = pd.DataFrame(
        records,
        columns=["tile_id", "dataset", "target", "z", "y", "x", "size"],
        index=pd.RangeIndex(1, len(records) + 1),
    )
    ids = table["tile_id"].tolist()
    dupes = sorted({t for t in ids if ids.count(t) > 1})
    if dupes:
        raise TesseraInputError(
            f"duplicate tile ids {dupes}; give each point its own tile_id or its own position",
            source=path,
        )
    for name in ("z", "y", "x", "size"):
        table[name] = table[name].astype(np.int64)
    table.attrs["source"] = str(path)
    return table


def export_tiles(level_array, points, *, level, factors, size=500, out_dir):
    """Cut one square tile around every point and write them for painting.

    Parameters
    ----------
    level_array : zarr.Array or ndarray
        ``(P, M, N)`` uint8 image at the working level (z, y, x). Only the tiles are read.
    points : pandas.DataFrame
        From :func:`read_points`, all of one dataset (the one `level_array` belongs to).
    level : int
        Index of the working level, recorded in the registry.
    factors : sequence of 3 int
        Reduction of that level relative to level 0 (z, y, x).
    size : int, optional
        Tile side in pixels at the working level, used where the sheet gives none.
    out_dir : str or Path
        Directory to create (replaced as a whole if it exists).

    Returns
    -------
    pandas.DataFrame
        The registry written to ``tiles.tsv`` (source ``"painted"``).

    Notes
    -----
    A point at level-0 ``(z, y, x)`` maps to ``(z // fz, y // fy, x // fx)``; its tile covers
    rows ``y // fy - size // 2`` to ``y // fy - size // 2 + size - 1`` (columns likewise). A tile
    reaching outside the image is an error naming the row, never shifted silently: moving it
    would change what the user chose. Nothing is written unless every point is valid.

    Examples
    --------
    >>> import tempfile
    >>> img = np.arange(2 * 8 * 8, dtype=np.uint8).reshape(2, 8, 8)
    >>> pts = pd.DataFrame({"tile_id": ["a"], "dataset": ["d"], "target": ["m"], "z": [1],
    ...                     "y": [8], "x": [8], "size": [0]}, index=[1])
    >>> d = Path(tempfile.mkdtemp()) / "tiles"
    >>> reg = export_tiles(img, pts, level=1, factors=(1, 2, 2), size=4, out_dir=d)
    >>> reg.loc[0, ["z", "y0", "x0"]].tolist()
    [1, 2, 2]
    >>> bool((tifffile.imread(d / "a.tif") == img[1, 2:6, 2:6]).all())
    True
    """
    out_dir = Path(out_dir)
    level = _as_int(level, low=0, where="level", source=None)
    fz, fy, fx = _check_factors(factors)
    size = _as_int(size, low=1, where="size", source=None)
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
        z, yc, xc = int(p["z"]) // fz, int(p["y"]) // fy, int(p["x"]) // fx
        y0, x0 = yc - side // 2, xc - side // 2
        if not (
            0 <= z < shape[0]
            and y0 >= 0
            and x0 >= 0
            and y0 + side <= shape[1]
            and x0 + side <= shape[2]
        ):
            raise TesseraInputError(
                f"row {idx} (tile {p['tile_id']!r}): the {side} x {side} tile around level-0 "
                f"point z={p['z']}, y={p['y']}, x={p['x']} covers level-{level} z={z}, rows "
                f"{y0}..{y0 + side - 1}, columns {x0}..{x0 + side - 1}, outside the image of "
                f"shape {shape}; move the point at least {side // 2} pixels (level {level}) "
                "from the edge or use a smaller size",
                source=where_sheet,
            )
        rows.append(
            {
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
        )
    registry = validate_registry(pd.DataFrame(rows), source=where_sheet)
    with atomic_path(out_dir) as tmp:
        tmp.mkdir(parents=True)
        for r in registry.itertuples(index=False):
            tile = np.asarray(
                level_array[r.z, r.y0 : r.y0 + r.height, r.x0 : r.x0 + r.width], dtype=np.uint8
            )
            tifffile.imwrite(tmp / f"{r.tile_id}.tif", tile, photometric="minisblack")
            Image.fromarray(_preview(tile)).save(tmp / f"{r.tile_id}.preview.png")
        registry.to_csv(tmp / _REGISTRY_FILE, sep="\t", index=False)
    return registry


def _preview(tile):
    """Stretch the 1st-99th percentile range to 0-255 (uint8); flat tiles stay as they are."""
    lo, hi = np.percentile(tile, [1.0, 99.0])
    if hi <= lo:
        return tile.astype(np.uint8)
    scaled = (tile.astype(np.float32) - np.float32(lo)) * np.float32(255.0 / (hi - lo))
    return np.clip(np.rint(scaled), 0, 255).astype(np.uint8)


# ---------------------------------------------------------------------------------------------
# painted masks


def read_painted_mask(path, *, shape, ignore_value=None, allow_single_class=False):
    """Read one painted mask and return it as a uint8 label image (0, 1, 255).

    Parameters
    ----------
    path : str or Path
        PNG or TIFF, 8- or 16-bit (or 1-bit) greyscale; RGB(A) or palette images are accepted
        when every pixel is grey (equal colour channels) and fully opaque.
    shape : (int, int)
        Expected ``(height, width)``.
    ignore_value : int, optional
        Pixel value marking unsure pixels; mapped to 255 (ignore).
    allow_single_class : bool, optional
        Accept a mask with only background or only target pixels.

    Returns
    -------
    ndarray of uint8
        0 = background, 1 = target, 255 = ignore.

    Notes
    -----
    0 is background. The target is one non-zero value other than `ignore_value`: 1, 255, or
    65535 in a 16-bit file. Any other value is an error that lists the unexpected values.

    Examples
    --------
    >>> import tempfile
    >>> f = Path(tempfile.mkdtemp()) / "t.png"
    >>> Image.fromarray(np.array([[0, 255], [128, 0]], dtype=np.uint8)).save(f)
    >>> read_painted_mask(f, shape=(2, 2), ignore_value=128).tolist()
    [[0, 1], [255, 0]]
    """
    path = Path(path)
    shape = tuple(int(s) for s in shape)
    if ignore_value is not None:
        ignore_value = _as_int(ignore_value, low=1, where="ignore_value", source=None)
    if not path.is_file():
        raise TesseraInputError("mask file not found", source=path)
    array = _read_image(path)
    array = _to_grey(array, source=path)
    if array.shape != shape:
        raise TesseraInputError(
            f"expected a mask of shape {shape} (rows, columns), got {array.shape}", source=path
        )
    if array.dtype == bool:
        array = array.astype(np.uint8)
    if not np.issubdtype(array.dtype, np.integer):
        raise TesseraInputError(
            f"expected integer pixels (8- or 16-bit), got {array.dtype}", source=path
        )
    values = [int(v) for v in np.unique(array)]
    full = int(np.iinfo(array.dtype).max)
    candidates = {1, 255} | ({full} if full > 255 else set())
    rest = [v for v in values if v != 0 and v != ignore_value]
    allowed_text = f"0 (background) and one target value of {sorted(candidates)}" + (
        "" if ignore_value is None else f", plus {ignore_value} (ignore)"
    )
    unexpected = [v for v in rest if v not in candidates]
    if unexpected or len(rest) > 1:
        bad = unexpected if unexpected else rest
        hint = (
            ""
            if unexpected
            else "; if one of them marks unsure pixels, give it as the ignore value"
        )
        raise TesseraInputError(
            f"unexpected values {bad}; expected {allowed_text}{hint}", source=path
        )
    out = np.zeros(shape, dtype=np.uint8)
    if rest:
        out[array == rest[0]] = TARGET
    if ignore_value is not None:
        out[array == ignore_value] = IGNORE
    if not allow_single_class:
        has_bg = bool((out == BACKGROUND).any())
        has_fg = bool((out == TARGET).any())
        if not (has_bg and has_fg):
            what = (
                "no target pixels"
                if has_bg
                else ("no background pixels" if has_fg else "neither target nor background")
            )
            raise TesseraInputError(
                f"the mask has {what}; a painted tile needs both classes (paint every target "
                "pixel, leave background at 0) unless single-class tiles are allowed",
                source=path,
            )
    return out


def import_painted(tiles_dir, masks_dir, *, ignore_value=None, allow_single_class=False):
    """Read the painted mask of every exported tile.

    Parameters
    ----------
    tiles_dir : str or Path
        Directory written by :func:`export_tiles` (its ``tiles.tsv`` lists the tiles).
    masks_dir : str or Path
        Directory with one ``<tile_id>.png`` (or ``.tif``/``.tiff``) per tile; must not be
        `tiles_dir`, whose ``<tile_id>.tif`` files are the raw tiles.
    ignore_value, allow_single_class
        As in :func:`read_painted_mask`.

    Returns
    -------
    registry : pandas.DataFrame
    labels : dict of str to ndarray
        Ready for :func:`write_annotation_set`.
    """
    tiles_dir, masks_dir = Path(tiles_dir), Path(masks_dir)
    if not masks_dir.is_dir():
        raise TesseraInputError("masks directory not found", source=masks_dir)
    if masks_dir.resolve() == tiles_dir.resolve():
        raise TesseraInputError(
            "save painted masks in their own directory, not beside the "
            "exported raw tiles (whose .tif names they would share)",
            source=masks_dir,
        )
    registry = read_registry(tiles_dir / _REGISTRY_FILE)
    labels = {}
    for row in registry.itertuples(index=False):
        found = [
            masks_dir / f"{row.tile_id}{s}"
            for s in _MASK_SUFFIXES
            if (masks_dir / f"{row.tile_id}{s}").is_file()
        ]
        if not found:
            raise TesseraInputError(
                f"no mask for tile {row.tile_id!r}; expected {row.tile_id}.png (or "
                f"{row.tile_id}.tif)",
                source=masks_dir,
            )
        if len(found) > 1:
            raise TesseraInputError(
                f"several masks for tile {row.tile_id!r}: {[f.name for f in found]}; keep one",
                source=masks_dir,
            )
        labels[row.tile_id] = read_painted_mask(
            found[0],
            shape=(row.height, row.width),
            ignore_value=ignore_value,
            allow_single_class=allow_single_class,
        )
    return registry, labels


# ---------------------------------------------------------------------------------------------
# tiles from full label volumes


def labels_to_target_mask(labels, *, factors, threshold=0):
    """Binary target mask at a reduced level, by block majority.

    Parameters
    ----------
    labels : ndarray
        ``(P, M, N)`` level-0 labels; any integer (or bool) dtype. Voxels with a value above
        `threshold` are target.
    factors : sequence of 3 int
        Reduction (z, y, x) of the working level.
    threshold : int, optional
        0 for label volumes (any non-zero label is target); 127 for 8-bit binary images with
        anti-aliased edges.

    Returns
    -------
    ndarray of uint8
        ``ceil(shape / factors)`` mask, 1 where more than half of the block's voxels are
        target (``block_mean`` of the binary mask > 0.5; a tie is background).

    Examples
    --------
    >>> lab = np.array([[[0, 3, 3, 3], [0, 0, 3, 0]]], dtype=np.uint16)
    >>> labels_to_target_mask(lab, factors=(1, 2, 2))
    array([[[0, 1]]], dtype=uint8)
    """
    labels = np.asarray(labels)
    if labels.ndim != 3:
        raise TesseraInputError(f"expected 3D (z, y, x) labels, got shape {labels.shape}")
    if not (np.issubdtype(labels.dtype, np.integer) or labels.dtype == bool):
        raise TesseraInputError(f"expected integer labels, got {labels.dtype}")
    factors = _check_factors(factors)
    binary = labels > threshold
    if factors == (1, 1, 1):
        return binary.astype(np.uint8)
    return (block_mean(binary, factors) > 0.5).astype(np.uint8)


def _tile_mask(label_source, z, y0, x0, height, width, factors, threshold):
    """Working-level mask of one tile, reading only its level-0 region."""
    fz, fy, fx = factors
    nz, ny, nx = label_source.shape
    region = label_source[
        z * fz : min((z + 1) * fz, nz),
        y0 * fy : min((y0 + height) * fy, ny),
        x0 * fx : min((x0 + width) * fx, nx),
    ]
    return labels_to_target_mask(np.asarray(region), factors=factors, threshold=threshold)[0]


def sample_tiles_from_labels(
    label_source,
    *,
    dataset,
    target,
    level,
    factors,
    size,
    count,
    seed,
    exclude_z=(),
    min_fraction=0.0,
    threshold=0,
    max_tries=200,
):
    """Sample annotation tiles from a full label volume.

    Parameters
    ----------
    label_source : zarr.Array or ndarray
        ``(P, M, N)`` level-0 labels (z, y, x); only the sampled regions are read.
    dataset, target : str
        Names recorded in the registry.
    level : int
        Working level index, recorded in the registry.
    factors : sequence of 3 int
        Reduction of the working level (z, y, x).
    size : int
        Tile side at the working level.
    count : int
        Number of tiles.
    seed : int
        Seed; the same inputs and seed give the same tiles.
    exclude_z : iterable of int, optional
        Level-0 sections never to sample (QC-flagged); a working-level section is skipped when
        any level-0 section it averages is excluded.
    min_fraction : float, optional
        Minimum target fraction of a tile (ignored pixels do not exist here).
    threshold : int, optional
        Target is ``label > threshold`` (see :func:`labels_to_target_mask`).
    max_tries : int, optional
        Random positions tried per tile before giving up.

    Returns
    -------
    registry : pandas.DataFrame
        Source ``"labels"``; tile ids ``<dataset>-<target>-s<NNN>`` (sanitised).
    labels : dict of str to ndarray
        ``(size, size)`` uint8 masks of 0 and 1.

    Notes
    -----
    Sections are used in turn from a seeded permutation of the allowed sections, so tiles
    spread evenly over z; a section that cannot take a tile (no room, or no position reaching
    `min_fraction` in `max_tries` tries) passes its turn to the next one. Within a section
    positions are uniform and tiles on the same section do not overlap. Tiles lie wholly
    inside the working-level grid.

    Examples
    --------
    >>> lab = np.zeros((4, 32, 32), dtype=np.uint8); lab[:, 8:24, 8:24] = 1
    >>> reg, masks = sample_tiles_from_labels(lab, dataset="d", target="m", level=1,
    ...     factors=(1, 2, 2), size=8, count=3, seed=0, exclude_z=[2])
    >>> sorted(reg["z"].tolist()), masks[reg.loc[0, "tile_id"]].shape
    ([0, 1, 3], (8, 8))
    """
    for key, value in (("dataset", dataset), ("target", target)):
        if not isinstance(value, str) or not value:
            raise TesseraInputError(f"{key} must be a non-empty string, got {value!r}")
    shape0 = tuple(int(s) for s in label_source.shape)
    if len(shape0) != 3:
        raise TesseraInputError(f"expected 3D (z, y, x) labels, got shape {shape0}")
    level = _as_int(level, low=0, where="level", source=None)
    factors = _check_factors(factors)
    size = _as_int(size, low=1, where="size", source=None)
    count = _as_int(count, low=1, where="count", source=None)
    seed = _as_int(seed, low=0, where="seed", source=None)
    max_tries = _as_int(max_tries, low=1, where="max_tries", source=None)
    try:
        min_fraction = float(min_fraction)
    except (TypeError, ValueError):
        raise TesseraInputError(f"min_fraction must be a number, got {min_fraction!r}") from None
    if not 0.0 <= min_fraction <= 1.0:
        raise TesseraInputError(f"min_fraction must be within [0, 1], got {min_fraction}")
    excluded = {_as_int(z, low=0, where="exclude_z", source=None) for z in exclude_z}
    nz, ny, nx = (-(-s // f) for s, f in zip(shape0, factors))
    if size > ny or size > nx:
        raise TesseraInputError(
            f"size {size} exceeds the level-{level} section ({ny} x {nx} pixels)"
        )
    fz = factors[0]
    allowed = [
        z
        for z in range(nz)
        if not any(z0 in excluded for z0 in range(z * fz, min((z + 1) * fz, shape0[0])))
    ]
    if not allowed:
        raise TesseraInputError(
            f"every section is excluded ({sorted(excluded)}); nothing to sample from"
        )
    rng = np.random.default_rng(seed)
    order = [int(z) for z in rng.permutation(allowed)]
    prefix = re.sub(r"[^A-Za-z0-9_-]", "-", f"{dataset}-{target}")
    rows, masks = [], {}
    for i in range(count):
        placed = None
        # The section whose turn it is first; if it cannot take the tile, the following ones.
        for k in range(len(order)):
            z = order[(i + k) % len(order)]
            placed = _place_tile(
                label_source,
                rng,
                rows,
                z,
                ny,
                nx,
                size,
                factors,
                threshold,
                min_fraction,
                max_tries,
            )
            if placed is not None:
                break
        if placed is None:
            raise TesseraInputError(
                f"could not place tile {i + 1} of {count} on any allowed level-{level} section "
                f"in {max_tries} tries each (non-overlapping, target fraction >= "
                f"{min_fraction}); lower count, size or min_fraction"
            )
        y0, x0, mask = placed
        tid = f"{prefix}-s{i + 1:03d}"
        rows.append(
            {
                "tile_id": tid,
                "dataset": dataset,
                "target": target,
                "level": level,
                "z": z,
                "y0": y0,
                "x0": x0,
                "height": size,
                "width": size,
                "source": "labels",
            }
        )
        masks[tid] = mask
    return validate_registry(pd.DataFrame(rows)), masks


def _place_tile(
    label_source, rng, rows, z, ny, nx, size, factors, threshold, min_fraction, max_tries
):
    """A random tile position on section z: (y0, x0, mask), or None after `max_tries`."""
    taken = [(r["y0"], r["x0"]) for r in rows if r["z"] == z]
    for _ in range(max_tries):
        y0 = int(rng.integers(0, ny - size + 1))
        x0 = int(rng.integers(0, nx - size + 1))
        if any(abs(y0 - ty) < size and abs(x0 - tx) < size for ty, tx in taken):
            continue
        mask = _tile_mask(label_source, z, y0, x0, size, size, factors, threshold)
        if min_fraction > 0 and mask.mean() < min_fraction:
            continue
        return y0, x0, mask
    return None


# ---------------------------------------------------------------------------------------------
# splitting


def split_tiles(registry, *, fractions=(0.6, 0.2, 0.2), guard_sections=2, seed=0):
    """Assign every tile a role: train, validation, test, or guard (unused).

    Parameters
    ----------
    registry : pandas.DataFrame
        See :func:`validate_registry`; an existing ``role`` column is replaced.
    fractions : (float, float, float), optional
        Wanted shares of train, validation and test tiles (non-negative, sum 1).
    guard_sections : int, optional
        Minimum distance ``|z_heldout - z_train|``, counted in the registry's ``z`` grid (the
        working level's sections), between every validation or test tile and every training
        tile of the same dataset and target. 0 allows the same section.
    seed : int, optional
        Chooses, per dataset and target, whether training takes the low or the high end of z and
        whether validation or test sits next to it.

    Returns
    -------
    pandas.DataFrame
        A validated copy of `registry` (same row order) with a ``role`` column. Rows that had
        to be dropped to keep the distance have role ``"guard"``; count them for the report.

    Notes
    -----
    Each dataset and target is split on its own (a model of one target never trains on the
    tiles of another). Tiles are sorted by z and each role takes one contiguous z range, training
    at one end, so only one gap of ``guard_sections - 1`` sections is lost. The training range
    is the one whose train and held-out counts come closest to the wanted shares; the held-out
    range is then divided between validation and test at a section boundary. A section is
    never shared between roles.

    Examples
    --------
    >>> reg = pd.DataFrame({"tile_id": [f"t{z}" for z in range(10)], "dataset": "d",
    ...     "target": "m", "level": 0, "z": range(10), "y0": 0, "x0": 0, "height": 4,
    ...     "width": 4, "source": "labels"})
    >>> split_tiles(reg, guard_sections=2, seed=0)["role"].value_counts().sort_index().to_dict()
    {'guard': 1, 'test': 1, 'train': 6, 'validation': 2}
    """
    table = validate_registry(
        registry.drop(columns=["role"], errors="ignore")
        if isinstance(registry, pd.DataFrame)
        else registry
    )
    try:
        fr = [float(f) for f in fractions]
    except (TypeError, ValueError):
        raise TesseraInputError(f"fractions must be three numbers, got {fractions!r}") from None
    if len(fr) != 3 or min(fr) < 0 or not np.isfinite(fr).all() or abs(sum(fr) - 1) > 1e-6:
        raise TesseraInputError(
            f"fractions (train, validation, test) must be three numbers >= 0 summing to 1, got "
            f"{fractions!r}"
        )
    guard = _as_int(guard_sections, low=0, where="guard_sections", source=None)
    seed = _as_int(seed, low=0, where="seed", source=None)
    roles = pd.Series("", index=table.index, dtype=object)
    for (dataset, target), group in table.groupby(["dataset", "target"], sort=True):
        key = zlib.crc32(f"{dataset}\t{target}".encode())
        rng = np.random.default_rng([seed, key])
        descending = bool(rng.integers(2))
        test_first = bool(rng.integers(2))
        roles.loc[group.index] = _split_group(group["z"], fr, guard, descending, test_first)
    table["role"] = roles.astype(str)
    return table


def _split_group(z, fr, guard, descending, test_first):
    """Roles of one dataset/target group (a pandas Series of z) as a list in its order."""
    sign = -1 if descending else 1
    pos = sign * z.to_numpy(dtype=np.int64)  # training sits at the low end of `pos`
    levels = np.unique(pos)
    per_level = np.array([np.count_nonzero(pos == v) for v in levels])
    n = len(pos)
    want_train = fr[0] * n
    best = None
    # i = number of sections given to training (0..all); held-out starts at the first section
    # at least `guard` away from the last training section.
    for i in range(len(levels) + 1):
        n_train = int(per_level[:i].sum())
        if i == 0:
            j = 0
        else:
            j = int(np.searchsorted(levels, levels[i - 1] + max(guard, 1), side="left"))
        n_held = int(per_level[j:].sum())
        dropped = n - n_train - n_held
        score = (
            abs(n_train - want_train) + abs(n_held - (n - want_train)),
            dropped,
            abs(n_train - want_train),
            i,
        )
        if best is None or score < best[0]:
            best = (score, i, j)
    _, i, j = best
    roles = np.full(n, "guard", dtype=object)
    train_levels = levels[:i]
    held_levels = levels[j:]
    roles[np.isin(pos, train_levels)] = "train"
    if len(held_levels):
        held_counts = per_level[j:]
        near, far = ("test", "validation") if test_first else ("validation", "test")
        share_val = fr[1] / (fr[1] + fr[2]) if fr[1] + fr[2] > 0 else 0.0
        want_near = (share_val if near == "validation" else 1 - share_val) * held_counts.sum()
        cum = np.concatenate([[0], np.cumsum(held_counts)])
        k = int(np.argmin(np.abs(cum - want_near)))
        roles[np.isin(pos, held_levels[:k])] = near
        roles[np.isin(pos, held_levels[k:])] = far
    return roles.tolist()


def write_split(path, registry):
    """Write a split registry (with ``role``) as TSV, atomically.

    Parameters
    ----------
    path : str or Path
        Output TSV; read it back with :func:`read_registry`.
    registry : pandas.DataFrame
        From :func:`split_tiles`.
    """
    table = validate_registry(registry, source="registry")
    if "role" not in table.columns:
        raise TesseraInputError(
            "the registry has no 'role' column; run split_tiles first", source="registry"
        )
    with atomic_path(path) as tmp:
        table.to_csv(tmp, sep="\t", index=False)


# ---------------------------------------------------------------------------------------------
# reading a tile with a halo


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
            _as_int(get(k), low=0, where=k, source=None)
            for k in ("z", "y0", "x0", "height", "width")
        )
    except (AttributeError, KeyError):
        raise TesseraInputError("a tile row needs z, y0, x0, height and width") from None
    halo = _as_int(halo, low=0, where="halo", source=None)
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


# ---------------------------------------------------------------------------------------------
# helpers


def _is_blank(value):
    if value is None:
        return True
    if isinstance(value, float) and np.isnan(value):
        return True
    return isinstance(value, str) and not value.strip()


def _as_int(value, *, low, where, source):
    """An integer >= low from an int or integer text; anything else is an error."""
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


def _check_factors(factors):
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


def _read_tsv(path):
    if not path.is_file():
        raise TesseraInputError("file not found", source=path)
    try:
        return pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise TesseraInputError(f"not a readable tab-separated table: {exc}", source=path) from None


def _read_image(path):
    """Pixels of a PNG (via Pillow) or TIFF (via tifffile) without conversion."""
    suffix = path.suffix.lower()
    try:
        if suffix in (".tif", ".tiff"):
            return np.asarray(tifffile.imread(path))
        with Image.open(path) as im:
            if im.mode == "P":
                im = im.convert("RGBA")
            return np.asarray(im)
    except (OSError, ValueError, tifffile.TiffFileError) as exc:
        raise TesseraInputError(f"cannot read the image: {exc}", source=path) from None


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


def _check_label_dict(table, labels):
    if not isinstance(labels, dict):
        raise TesseraInputError(
            f"labels must be a dict tile_id -> array, got {type(labels).__name__}"
        )
    extra = sorted(set(labels) - set(table["tile_id"]))
    if extra:
        raise TesseraInputError(f"labels for tiles not in the registry: {extra}")
    checked = {}
    for row in table.itertuples(index=False):
        if row.tile_id not in labels:
            raise TesseraInputError(f"no label image for tile {row.tile_id!r}")
        array = np.asarray(labels[row.tile_id])
        if array.dtype != np.uint8 or array.shape != (row.height, row.width):
            raise TesseraInputError(
                f"label image of tile {row.tile_id!r}: expected uint8 of shape "
                f"({row.height}, {row.width}), got {array.dtype} of shape {array.shape}"
            )
        unexpected = np.setdiff1d(np.unique(array), [BACKGROUND, TARGET, IGNORE])
        if unexpected.size:
            raise TesseraInputError(
                f"label image of tile {row.tile_id!r}: unexpected values "
                f"{unexpected.tolist()}; expected 0, 1 and 255"
            )
        checked[row.tile_id] = array
    return checked


# --------------------------------------------------------------------------------------------
# workflow jobs


def sample_tiles_job(
    labels_path,
    image_path,
    qc_table,
    out_dir,
    *,
    dataset,
    target,
    downsample,
    size,
    count,
    seed,
    exclude_flagged=True,
):
    """Sample annotation tiles of one dataset from a full label volume (TIFF stack, >0 = target).

    The label stack is read whole: full label volumes exist for synthetic and open benchmark
    data of modest size; real studies annotate tiles (the painted route) instead.
    """
    _, info = open_image(image_path)
    level = working_level(info["factors"], downsample, source=image_path)
    try:
        labels = tifffile.imread(labels_path)
    except (OSError, ValueError, tifffile.TiffFileError) as exc:
        raise TesseraInputError(f"cannot read label volume: {exc}", source=labels_path) from None
    if labels.shape != tuple(info["levels"][0].shape):
        raise TesseraInputError(
            f"label volume has shape {labels.shape}, the image {tuple(info['levels'][0].shape)}",
            source=labels_path,
        )
    exclude = []
    if exclude_flagged:
        qc = pd.read_csv(qc_table, sep="\t")
        exclude = [int(z) for z in qc.loc[qc["excluded"].astype(bool), "z"]]
    registry, tile_labels = sample_tiles_from_labels(
        labels,
        dataset=dataset,
        target=target,
        level=level,
        factors=info["factors"][level],
        size=size,
        count=count,
        seed=seed,
        exclude_z=exclude,
    )
    write_annotation_set(out_dir, registry, tile_labels)
    return {"tiles": len(registry), "excluded_sections": exclude, "level": level}


def split_job(annotation_dirs, out_dir, *, fractions, guard_sections, seed):
    """Merge the annotation sets of one target and split them into train / validation / test."""
    registries, labels = [], {}
    for path in annotation_dirs:
        registry, tile_labels = read_annotation_set(path)
        registries.append(registry)
        labels.update(tile_labels)
    merged = pd.concat(registries, ignore_index=True)
    split = split_tiles(
        merged, fractions=tuple(fractions), guard_sections=guard_sections, seed=seed
    )
    write_annotation_set(out_dir, split, labels)
    return split["role"].value_counts().to_dict()


def export_tiles_job(
    image_path, points_path, out_dir, *, dataset, target, downsample, size, datasets, targets
):
    """Cut this dataset's tiles of one target from the points sheet, for painting."""
    _, info = open_image(image_path)
    level = working_level(info["factors"], downsample, source=image_path)
    points = read_points(points_path, datasets=datasets, targets=targets)
    mine = points[(points["dataset"] == dataset) & (points["target"] == target)]
    if mine.empty:
        raise TesseraInputError(
            f"no points for dataset {dataset!r} and target {target!r}", source=points_path
        )
    registry = export_tiles(
        info["levels"][level],
        mine,
        level=level,
        factors=info["factors"][level],
        size=size,
        out_dir=out_dir,
    )
    return {"tiles": len(registry), "level": level}


def import_tiles_job(
    exported_dir, masks_dir, out_dir, *, ignore_value=None, allow_single_class=False
):
    """Read the painted masks of exported tiles and register them as an annotation set."""
    if masks_dir is None or not Path(masks_dir).is_dir():
        raise TesseraInputError(
            f"no painted masks yet: paint the tiles in {exported_dir} (previews *.preview.png) and "
            f"save one mask per tile as <tile_id>.png (0 = background, 1 or 255 = target) in the "
            f"folder named by annotations.painted.masks",
            source=masks_dir,
        )
    registry, labels = import_painted(
        exported_dir, masks_dir, ignore_value=ignore_value, allow_single_class=allow_single_class
    )
    write_annotation_set(out_dir, registry, labels)
    return {"tiles": len(registry)}
