"""Tiles exported for painting, their one writer, and the painted masks that come back.

The export (``results/<dataset>/to_paint/<target>``) is one directory, written as a whole::

    <out>/tiles.tsv                 the registry (source "painted")
    <out>/<tile_id>.tif             the raw uint8 tile, unchanged
    <out>/<tile_id>.preview.png     the tile contrast-stretched (1st-99th percentile) for painting

Painted masks come back as ``<masks>/<tile_id>.png`` (or ``.tif`` / ``.tiff``): 0 for
background and one value (1 or 255, or 65535 in a 16-bit file) for every target pixel.
"""

import hashlib
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.image_files import read_image
from tessera.tiles.checks import as_int
from tessera.tiles.painting import contrast_preview, painted_to_labels, tiles_around_points
from tessera.workflow.files.tile_registry import REGISTRY_FILE, read_registry

__all__ = [
    "export_tiles",
    "exported_tile_sha256",
    "import_painted",
    "mask_files",
    "read_painted_mask",
    "unmatched_masks",
]

_MASK_SUFFIXES = (".png", ".tif", ".tiff")


def export_tiles(level_array, points, *, level, factors, size=500, out_dir):
    """Cut one square tile around every point and write them for painting.

    Parameters
    ----------
    level_array : zarr.Array or ndarray
        ``(P, M, N)`` uint8 image at the working level (z, y, x). Only the tiles are read.
    points : pandas.DataFrame
        From :func:`tessera.workflow.files.points.read_points`, all of one dataset (the one
        `level_array` belongs to).
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
    Where each tile lies: :func:`tessera.tiles.painting.tiles_around_points`. Nothing is
    written unless every point is valid.

    Examples
    --------
    >>> import tempfile
    >>> import pandas as pd
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
    registry = tiles_around_points(level_array, points, level=level, factors=factors, size=size)
    with atomic_path(out_dir) as tmp:
        tmp.mkdir(parents=True)
        for r in registry.itertuples(index=False):
            tile = np.asarray(
                level_array[r.z, r.y0 : r.y0 + r.height, r.x0 : r.x0 + r.width], dtype=np.uint8
            )
            tifffile.imwrite(tmp / f"{r.tile_id}.tif", tile, photometric="minisblack")
            Image.fromarray(contrast_preview(tile)).save(tmp / f"{r.tile_id}.preview.png")
        registry.to_csv(tmp / REGISTRY_FILE, sep="\t", index=False)
    return registry


def read_painted_mask(path, *, shape, ignore_value=None, allow_single_class=False):
    """Read one painted mask and return it as a uint8 label image.

    Parameters
    ----------
    path : str or Path
        PNG or TIFF, 8- or 16-bit (or 1-bit) greyscale; RGB(A) or palette PNGs are accepted
        when every pixel is grey (equal colour channels) and fully opaque.
    shape : (int, int)
        Expected ``(height, width)``.
    ignore_value : int, optional
        Pixel value marking unsure pixels; mapped to ignore.
    allow_single_class : bool, optional
        Accept a mask with only background or only target pixels.

    Returns
    -------
    ndarray of uint8
        Background, target and ignore values of :mod:`tessera.label_values`; see
        :func:`tessera.tiles.painting.painted_to_labels` for the values a mask may hold.

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
        ignore_value = as_int(ignore_value, low=1, where="ignore_value", source=None)
    if not path.is_file():
        raise TesseraInputError("mask file not found", source=path)
    return painted_to_labels(
        read_image(path),
        shape=shape,
        ignore_value=ignore_value,
        allow_single_class=allow_single_class,
        source=path,
    )


def mask_files(masks_dir, tile_id):
    """The files in `masks_dir` that are a mask of tile `tile_id` (``.png``, ``.tif``,
    ``.tiff``): one when the tile is painted.

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp()); (d / "t1.png").write_bytes(b"")
    0
    >>> [f.name for f in mask_files(d, "t1")], mask_files(d, "t2")
    (['t1.png'], [])
    """
    masks_dir = Path(masks_dir)
    return [
        masks_dir / f"{tile_id}{s}"
        for s in _MASK_SUFFIXES
        if (masks_dir / f"{tile_id}{s}").is_file()
    ]


def unmatched_masks(masks_dir, tile_ids):
    """Names of the image files in `masks_dir` that are the mask of none of `tile_ids` (a name
    mistyped, a copy an editor saved beside the mask), sorted; hidden files are left out.

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> for name in ("t1.png", "t1 copy.png", "notes.txt"):
    ...     _ = (d / name).write_bytes(b"")
    >>> unmatched_masks(d, ["t1"])
    ['t1 copy.png']
    """
    tile_ids = set(tile_ids)
    return sorted(
        f.name
        for f in Path(masks_dir).iterdir()
        if f.is_file()
        and not f.name.startswith(".")
        and f.suffix.lower() in _MASK_SUFFIXES
        and f.stem not in tile_ids
    )


def exported_tile_sha256(tiles_dir, tile_id):
    """SHA-256 of an exported tile's pixels (shape, dtype and values; not the file's bytes, so
    a TIFF written again with other tags gives the same digest).

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> tifffile.imwrite(d / "t1.tif", np.zeros((2, 3), np.uint8))
    >>> exported_tile_sha256(d, "t1")[:12]
    'eeead995c675'
    """
    pixels = np.ascontiguousarray(tifffile.imread(Path(tiles_dir) / f"{tile_id}.tif"))
    digest = hashlib.sha256(f"{pixels.shape}{pixels.dtype.str}".encode())
    digest.update(pixels.tobytes())
    return digest.hexdigest()


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
        Ready for :func:`tessera.workflow.files.tile_registry.write_annotation_set`.
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
    registry = read_registry(tiles_dir / REGISTRY_FILE)
    labels = {}
    for row in registry.itertuples(index=False):
        found = mask_files(masks_dir, row.tile_id)
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
