"""A tile set on disk, its one reader and writer: ``tiles.tsv`` and ``labels/<tile_id>.png``.

An *annotation set* (``results/<dataset>/tiles/<target>``, ``results/<dataset>/tiles_painted/
<target>``, ``results/study/<target>/tiles``) is one directory, written as a whole
(atomically)::

    <set>/tiles.tsv             the registry (columns: tessera.tiles.registry)
    <set>/labels/<tile_id>.png  8-bit greyscale PNG of the values of tessera.label_values

A split table (the registry with ``role``) can also stand alone as one TSV.
"""

from pathlib import Path

import numpy as np
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.image_files import read_image
from tessera.io.text_tables import read_text_table
from tessera.label_values import BACKGROUND, IGNORE, TARGET
from tessera.tiles.registry import (
    check_label_images,
    unexpected_label_values,
    validate_registry,
)

__all__ = [
    "REGISTRY_FILE",
    "read_annotation_set",
    "read_registry",
    "write_annotation_set",
    "write_split",
]

#: The registry's file name in a tile set (and in a folder of tiles exported for painting).
REGISTRY_FILE = "tiles.tsv"
_LABELS_DIR = "labels"


def read_registry(path):
    """Read and validate a registry TSV (``tiles.tsv`` or a split table).

    Parameters
    ----------
    path : str or Path
        Tab-separated file with a header line.

    Returns
    -------
    pandas.DataFrame
        As from :func:`tessera.tiles.registry.validate_registry`.
    """
    path = Path(path)
    return validate_registry(read_text_table(path), source=path)


def write_annotation_set(path, registry, labels):
    """Write an annotation set directory (``tiles.tsv`` and ``labels/<tile_id>.png``) atomically.

    Parameters
    ----------
    path : str or Path
        Directory to create; an existing one is replaced as a whole.
    registry : pandas.DataFrame
        See :func:`tessera.tiles.registry.validate_registry`.
    labels : dict of str to ndarray
        ``tile_id -> (height, width)`` uint8 array of the values of :mod:`tessera.label_values`,
        for every registry row (extra entries are an error too).

    Examples
    --------
    >>> import tempfile
    >>> import pandas as pd
    >>> reg = pd.DataFrame({"tile_id": ["t1"], "dataset": ["d"], "target": ["m"], "level": [0],
    ...                     "z": [0], "y0": [0], "x0": [0], "height": [2], "width": [3],
    ...                     "source": ["painted"]})
    >>> lab = {"t1": np.array([[BACKGROUND, TARGET, IGNORE], [0, 0, 1]], dtype=np.uint8)}
    >>> d = Path(tempfile.mkdtemp()) / "set"
    >>> write_annotation_set(d, reg, lab)
    >>> read_annotation_set(d)[1]["t1"].tolist()
    [[0, 1, 255], [0, 0, 1]]
    """
    path = Path(path)
    table = validate_registry(registry, source="registry")
    checked = check_label_images(table, labels)
    with atomic_path(path) as tmp:
        (tmp / _LABELS_DIR).mkdir(parents=True)
        table.to_csv(tmp / REGISTRY_FILE, sep="\t", index=False)
        for tid, array in checked.items():
            Image.fromarray(array).save(tmp / _LABELS_DIR / f"{tid}.png")


def read_annotation_set(path, *, roles=None):
    """Read and validate an annotation set written by :func:`write_annotation_set`.

    With `roles` (split sets only), only the tiles of those roles are read and returned: a job
    that must not see the test tiles never opens their label images.

    Returns
    -------
    registry : pandas.DataFrame
    labels : dict of str to ndarray
        ``(height, width)`` uint8 arrays of the values of :mod:`tessera.label_values`.
    """
    path = Path(path)
    table = read_registry(path / REGISTRY_FILE)
    if roles is not None:
        if "role" not in table.columns:
            raise TesseraInputError(
                "the registry has no 'role' column; run split_tiles first", source=path
            )
        table = table[table["role"].isin(list(roles))].reset_index(drop=True)
    labels = {}
    for row in table.itertuples(index=False):
        file = path / _LABELS_DIR / f"{row.tile_id}.png"
        if not file.is_file():
            raise TesseraInputError(f"label image of tile {row.tile_id!r} is missing", source=file)
        array = read_image(file)
        if array.dtype != np.uint8 or array.shape != (row.height, row.width):
            raise TesseraInputError(
                f"expected a {row.height} x {row.width} 8-bit greyscale image, got "
                f"{array.dtype} of shape {array.shape}",
                source=file,
            )
        unexpected = unexpected_label_values(array)
        if unexpected.size:
            raise TesseraInputError(
                f"unexpected values {unexpected.tolist()}; a stored label image holds only "
                f"{BACKGROUND} (background), {TARGET} (target) and {IGNORE} (ignore)",
                source=file,
            )
        labels[row.tile_id] = array
    return table, labels


def write_split(path, registry):
    """Write a split registry (with ``role``) as TSV, atomically.

    Parameters
    ----------
    path : str or Path
        Output TSV; read it back with :func:`read_registry`.
    registry : pandas.DataFrame
        From :func:`tessera.tiles.split.split_tiles`.
    """
    table = validate_registry(registry, source="registry")
    if "role" not in table.columns:
        raise TesseraInputError(
            "the registry has no 'role' column; run split_tiles first", source="registry"
        )
    with atomic_path(path) as tmp:
        table.to_csv(tmp, sep="\t", index=False)
