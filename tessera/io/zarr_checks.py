"""Checks of a zarr array's files against its metadata (see :mod:`tessera.io.damage`)."""

from pathlib import Path

from tessera.errors import TesseraInputError

__all__ = ["check_chunk_grid"]


def check_chunk_grid(array, path):
    """Refuse stored chunk files outside the grid of the declared shape (metadata too small).

    A chunk that was never stored reads as the fill value (zarr spec), so a declared shape
    larger than the data cannot be told from a sparse array; a smaller one shows as chunk files
    beyond the grid, which zarr would silently ignore. Only a shrink across a chunk boundary
    shows: with chunks of one section (the usual layout of EM stacks) every shrink does.

    Parameters
    ----------
    array : zarr.Array
        Opened from a local folder.
    path : str or Path
        The folder `array` was opened from (its store root), named in the message.

    Examples
    --------
    >>> import json, tempfile
    >>> import zarr
    >>> folder = Path(tempfile.mkdtemp()) / "a.zarr"
    >>> zarr.create_array(store=str(folder), shape=(4, 2, 2), chunks=(1, 2, 2), dtype="uint8")[:] = 1
    >>> meta = json.loads((folder / "zarr.json").read_text())
    >>> meta["shape"] = [3, 2, 2]
    >>> _ = (folder / "zarr.json").write_text(json.dumps(meta))
    >>> check_chunk_grid(zarr.open_array(str(folder), mode="r"), folder)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: ...a.zarr: chunk file c/3/0/0 lies outside the declared shape (3, 2, 2) (chunk grid (3, 1, 1)): the metadata state less than was written (damaged or edited?)
    """
    folder = Path(path) / array.path if array.path else Path(path)
    if not folder.is_dir():
        return
    meta = array.metadata
    if array.metadata.zarr_format == 3:
        encoding = meta.chunk_key_encoding
        separator, prefix = encoding.separator, ("c",) if encoding.name == "default" else ()
    else:
        separator, prefix = meta.dimension_separator or ".", ()
    grid = (
        array.cdata_shape
        if array.shards is None
        else tuple(-(-n // c) for n, c in zip(array.shape, array.shards, strict=True))
    )
    for file in folder.rglob("*"):
        if not file.is_file():
            continue
        parts = file.relative_to(folder).as_posix().replace("/", separator).split(separator)
        parts = parts[len(prefix) :] if tuple(parts[: len(prefix)]) == prefix else None
        if not parts or len(parts) != len(grid) or not all(p.isdigit() for p in parts):
            continue  # metadata or other files: not a chunk key
        index = tuple(int(p) for p in parts)
        if any(i >= n for i, n in zip(index, grid, strict=True)):
            raise TesseraInputError(
                f"chunk file {file.relative_to(folder).as_posix()} lies outside the declared "
                f"shape {tuple(array.shape)} (chunk grid {tuple(grid)}): the metadata state "
                "less than was written (damaged or edited?)",
                source=path,
            )
