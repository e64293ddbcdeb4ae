"""Which reader opens an array inside a container file (HDF5, N5, plain zarr), by format name.

:func:`tessera.io.stacks.open_stack` asks here first; formats that hold one stack per file
(TIFF, slice folders, MRC) and OME-Zarr images get None and are read by :mod:`tessera.io.stacks`.
"""

from tessera.errors import TesseraInputError
from tessera.io.chunked_stacks import open_n5, open_zarr_array
from tessera.io.hdf5_stacks import open_hdf5

__all__ = ["INNER_PATH_FORMATS", "open_container"]

INNER_PATH_FORMATS = ("zarr", "hdf5", "n5")  # files that can hold several arrays


def open_container(path, fmt, *, internal_path=None):
    """The checked reader of an array inside a container file, or None for other formats.

    Parameters
    ----------
    path : Path
        The file or folder named in the sheet.
    fmt : str
        Its format (:data:`tessera.io.stacks.FORMATS`).
    internal_path : str, optional
        The array inside the container; required for hdf5 and n5, refused for formats holding
        one stack per file.

    Returns
    -------
    ArrayStack or None
        None for TIFF, slice folders, MRC and OME-Zarr images (read by :mod:`tessera.io.stacks`).

    Examples
    --------
    >>> open_container("stack.tif", "tiff_stack") is None
    True
    >>> open_container("stack.tif", "tiff_stack", internal_path="raw")
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: stack.tif: internal_path 'raw' is given, but format tiff_stack holds one stack per file; only zarr, hdf5, n5 take one
    """
    if internal_path is not None and fmt not in INNER_PATH_FORMATS:
        raise TesseraInputError(
            f"internal_path {internal_path!r} is given, but format {fmt} holds one stack per "
            f"file; only {', '.join(INNER_PATH_FORMATS)} take one",
            source=path,
        )
    if fmt in ("hdf5", "n5") and internal_path is None:
        raise TesseraInputError(
            f"format {fmt} needs internal_path, the array's path inside the file", source=path
        )
    if fmt == "hdf5":
        return open_hdf5(path, internal_path)
    if fmt == "n5":
        return open_n5(path, internal_path)
    if fmt == "zarr":
        return open_zarr_array(path, internal_path)  # None for an OME-Zarr image
    return None
