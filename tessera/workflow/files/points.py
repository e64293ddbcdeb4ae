"""The points sheet, its one reader: where to cut tiles for painting.

People write it (``annotations.painted.points`` in the config) and the next-tiles job suggests
one (``results/study/<target>/next_tiles/points.tsv``); the export job and the planning of
rules read it.
"""

from pathlib import Path

import numpy as np
import pandas as pd

from tessera.errors import TesseraInputError
from tessera.io.text_tables import read_text_table
from tessera.tiles.checks import TILE_ID, as_int, is_blank, safe_tile_id

__all__ = ["read_points"]

_POINT_COLUMNS = ("dataset", "target", "z", "y", "x")
_POINT_OPTIONAL = ("tile_id", "size", "role")
#: What the optional ``role`` column may say: blank (the split decides) or ``train`` (a tile
#: suggested where the model was unsure, painted to be learnt from: never a held-out tile).
POINT_ROLES = ("", "train")


def read_points(path, *, datasets, targets):
    """Read a points sheet: where to cut a tile for painting.

    Parameters
    ----------
    path : str or Path
        TSV with columns ``dataset``, ``target``, ``z``, ``y``, ``x`` (level-0 voxel
        coordinates of the tile centre) and optionally ``tile_id``, ``size`` (tile side in
        pixels at the working level; blank = the export default) and ``role`` (blank, or
        ``train`` for a tile that must be trained on: :data:`POINT_ROLES`).
    datasets, targets : iterable of str
        Known dataset and target names.

    Returns
    -------
    pandas.DataFrame
        Columns ``tile_id, dataset, target, z, y, x, size, role``; the index is the sheet row as an
        editor numbers its lines (the header is row 1, the first point row 2), so later errors
        can name the row. ``size`` is 0 and ``role`` blank
        where not given. Missing tile ids become ``<dataset>-<target>-z<z>-y<y>-x<x>`` (characters
        outside ``[A-Za-z0-9_-]`` replaced by ``-``).

    Examples
    --------
    >>> import tempfile
    >>> f = Path(tempfile.mkdtemp()) / "points.tsv"
    >>> _ = f.write_text("dataset\\ttarget\\tz\\ty\\tx\\nd1\\tmito\\t4\\t100\\t200\\n")
    >>> read_points(f, datasets=["d1"], targets=["mito"]).loc[2, "tile_id"]
    'd1-mito-z4-y100-x200'
    """
    path = Path(path)
    datasets = sorted(str(d) for d in datasets)
    targets = sorted(str(t) for t in targets)
    sheet = read_text_table(path)
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
    records = [
        _point_record(row, f"row {i + 2}", datasets, targets, path)
        for i, row in enumerate(sheet.to_dict("records"))
    ]
    table = pd.DataFrame(
        records,
        columns=["tile_id", "dataset", "target", "z", "y", "x", "size", "role"],
        index=pd.RangeIndex(2, len(records) + 2),
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


def check_points_in_annotated(points, *, target, annotated):
    """Refuse points of `target` in datasets outside its ``annotated_datasets`` (None: any).

    That setting names the datasets that give the target's tiles; the others are only
    predicted and measured. A point elsewhere (one merged from another run's suggestions, say)
    would quietly make a dataset a training one.

    Examples
    --------
    >>> pts = pd.DataFrame({"dataset": ["d1", "d3"], "target": "mito"}, index=[2, 3])
    >>> check_points_in_annotated(pts, target="mito", annotated=None)
    >>> check_points_in_annotated(pts, target="mito", annotated=["d1", "d2"])
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: row 3, column 'dataset': mito points in d3, which targets.mito.annotated_datasets leaves out (['d1', 'd2']); expected points in those datasets only: add d3 to annotated_datasets or remove those rows
    """
    if annotated is None:
        return
    mine = points[points["target"] == target]
    outside = mine[~mine["dataset"].isin(annotated)]
    if outside.empty:
        return
    names = ", ".join(sorted(set(outside["dataset"])))
    rows = ", ".join(str(i) for i in outside.index[:10]) + (", ..." if len(outside) > 10 else "")
    raise TesseraInputError(
        f"row{'s' if len(outside) > 1 else ''} {rows}, column 'dataset': {target} points in "
        f"{names}, which targets.{target}.annotated_datasets leaves out ({list(annotated)}); "
        f"expected points in those datasets only: add {names} to annotated_datasets or remove "
        "those rows",
        source=points.attrs.get("source"),
    )


def _point_record(row, where, datasets, targets, path):
    """One sheet row checked: known dataset and target, whole-number position, size, tile id."""
    rec = {}
    for name, known in (("dataset", datasets), ("target", targets)):
        value = "" if is_blank(row[name]) else str(row[name]).strip()
        if value not in known:
            raise TesseraInputError(
                f"{where}, column {name!r}: unknown {name} {value!r}; expected one of {known}",
                source=path,
            )
        rec[name] = value
    for name in ("z", "y", "x"):
        rec[name] = as_int(row[name], low=0, where=f"{where}, column {name!r}", source=path)
    size = row.get("size")
    rec["size"] = (
        0 if is_blank(size) else as_int(size, low=1, where=f"{where}, column 'size'", source=path)
    )
    tid = row.get("tile_id")
    if is_blank(tid) or not str(tid).strip():
        tid = safe_tile_id(f"{rec['dataset']}-{rec['target']}-z{rec['z']}-y{rec['y']}-x{rec['x']}")
    tid = str(tid).strip()
    if not TILE_ID.fullmatch(tid):
        raise TesseraInputError(
            f"{where}, column 'tile_id': {tid!r} must match [A-Za-z0-9_-]+", source=path
        )
    rec["tile_id"] = tid
    role = "" if is_blank(row.get("role")) else str(row.get("role")).strip()
    if role not in POINT_ROLES:
        raise TesseraInputError(
            f"{where}, column 'role': {role!r}; expected blank (the split decides) or 'train'",
            source=path,
        )
    rec["role"] = role
    return rec
