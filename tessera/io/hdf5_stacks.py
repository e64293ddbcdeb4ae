"""EM stacks stored as an HDF5 dataset, read one section at a time.

The sheet gives the file and the dataset's path inside it (``internal_path``). The dataset must be
3D (z, y, x) of integer or float type; its voxel size is read from its attributes where stated
(see :func:`tessera.io.array_stacks.spacing_from_attrs`: ``resolution`` in nm z, y, x,
``pixelResolution``, ``element_size_um`` in µm z, y, x). Chunks that were never written (they
would read as fill value) and data that live in another file (external links, virtual datasets)
are refused.
"""

import math
from pathlib import Path

import h5py

from tessera.errors import TesseraInputError
from tessera.io.array_stacks import (
    ArrayStack,
    MissingChunk,
    inner_parts,
    missing_chunk,
    spacing_from_attrs,
)

__all__ = ["open_hdf5"]


def open_hdf5(path, internal_path):
    """Open the dataset `internal_path` of the HDF5 file `path` for reading by sections.

    Parameters
    ----------
    path : str or Path
        The HDF5 file.
    internal_path : str
        The dataset inside it, e.g. ``volumes/raw``.

    Returns
    -------
    ArrayStack
        With ``shape``, ``dtype``, ``header_spacing``, ``read(z)`` and ``close()``.

    Examples
    --------
    >>> import tempfile
    >>> import numpy as np
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     with h5py.File(Path(folder) / "v.h5", "w") as f:
    ...         f["volumes/raw"] = np.arange(24, dtype=np.uint8).reshape(2, 3, 4)
    ...         f["volumes/raw"].attrs["resolution"] = [40, 4, 4]
    ...     stack = open_hdf5(Path(folder) / "v.h5", "volumes/raw")
    ...     print(stack.shape, stack.header_spacing, stack.read(1)[0].tolist())
    ...     stack.close()
    (2, 3, 4) (40.0, 4.0, 4.0) [12, 13, 14, 15]
    """
    path = Path(path)
    parts = inner_parts(internal_path, source=path)
    label = f"{path}, internal_path {'/'.join(parts)}"
    try:
        handle = h5py.File(path, "r")
    except OSError as exc:
        raise TesseraInputError(f"cannot read as HDF5: {exc}", source=path) from None
    try:
        dataset = _dataset(handle, parts, path, label)
        _check_stored_extent(dataset, label)
        spacing, attribute = spacing_from_attrs(dict(dataset.attrs), source=label)
    # RuntimeError: h5py's report of a damaged heap or B-tree (found by fuzzing)
    except (TesseraInputError, OSError, KeyError, TypeError, ValueError, RuntimeError) as exc:
        handle.close()
        if isinstance(exc, TesseraInputError):
            raise
        raise TesseraInputError(f"cannot read the dataset: {exc}", source=label) from None
    return ArrayStack(
        dataset,
        label=label,
        errors=(KeyError,),
        header_spacing=spacing,
        spacing_attribute=attribute,
        chunk_problem=_chunk_check(dataset),
        on_close=handle.close,
    )


def _dataset(handle, parts, path, label):
    node, walked = handle, []
    for name in parts:
        walked.append(name)
        if not isinstance(node, h5py.Group) or name not in node:
            raise TesseraInputError(
                f"internal_path: no {'/'.join(walked)!r} in the file "
                f"({'/'.join(walked[:-1]) or 'its top level'} holds {_names(node)})",
                source=path,
            )
        link = node.get(name, getlink=True)
        if isinstance(link, h5py.ExternalLink):
            raise TesseraInputError(
                f"{'/'.join(walked)!r} is an external link to {link.filename}; "
                "name that file in the sheet instead",
                source=label,
            )
        node = node[name]
    if not isinstance(node, h5py.Dataset):
        raise TesseraInputError(
            f"expected a dataset, found a group holding {_names(node)}", source=label
        )
    if node.is_virtual:
        raise TesseraInputError(
            "a virtual dataset (its data live in other files); name those files in the sheet",
            source=label,
        )
    return node


def _check_stored_extent(dataset, label):
    """Refuse a dataset whose stored data reach beyond its dataspace (the shape states less).

    HDF5 files of the default (earliest) format carry no checksum over their object headers
    (HDF5 File Format Specification, version 1 object headers), so a changed bit in the
    dataspace's dimensions reads as a smaller array. The data stored tell: a contiguous
    dataset's size is recorded apart from its shape (data layout message), and chunks are
    indexed by their offsets.
    """
    shape, itemsize = dataset.shape, dataset.dtype.itemsize
    if dataset.chunks is None:
        stored = dataset.id.get_storage_size()
        if stored and stored != dataset.size * itemsize:
            raise TesseraInputError(
                f"the dataset stores {stored} bytes, its shape {shape} of {dataset.dtype} "
                f"needs {dataset.size * itemsize} (damaged header?)",
                source=label,
            )
        return
    beyond, wrong_size = [], []
    # A chunk no filter was applied to is stored whole, chunk shape x item size bytes; compressed
    # bytes read as such would become pixels (a changed bit in the filter pipeline message, or
    # in a chunk's filter mask, both without checksum in default files).
    whole = math.prod(dataset.chunks) * itemsize
    filters = dataset.id.get_create_plist().get_nfilters()
    every_filter = (1 << filters) - 1

    def visit(chunk):
        if not beyond and any(o >= n for o, n in zip(chunk.chunk_offset, shape, strict=True)):
            beyond.append(chunk.chunk_offset)
        unfiltered = filters == 0 or (chunk.filter_mask & every_filter) == every_filter
        if not wrong_size and unfiltered and chunk.size != whole:
            wrong_size.append((chunk.chunk_offset, chunk.size))

    dataset.id.chunk_iter(visit)
    if beyond:
        raise TesseraInputError(
            f"a chunk is stored at offset {tuple(beyond[0])}, outside the shape {shape}: the "
            "dataspace states less than was written (damaged header?)",
            source=label,
        )
    if wrong_size:
        offset, size = wrong_size[0]
        raise TesseraInputError(
            f"the chunk at offset {tuple(offset)} is stored unfiltered in {size} bytes, a whole "
            f"chunk takes {whole} (damaged filter pipeline or chunk index?)",
            source=label,
        )


def _names(node):
    if not isinstance(node, h5py.Group):
        return "no group members"
    names = sorted(node)[:8]
    return ", ".join(names) + (" ..." if len(node) > 8 else "") if names else "nothing"


def _chunk_check(dataset):
    """Per section: the offset of a chunk never written, or None (see ArrayStack)."""
    if dataset.chunks is None:
        if dataset.id.get_storage_size() == 0 and dataset.size:
            nothing = "nothing was ever written to the dataset (it would read as fill value)"
            return lambda z: MissingChunk(nothing)
        return None
    chunks, shape = dataset.chunks, dataset.shape
    checked = set()

    def missing(z):
        row = z // chunks[0]
        if row in checked:
            return None
        for y in range(0, shape[1], chunks[1]):
            for x in range(0, shape[2], chunks[2]):
                offset = (row * chunks[0], y, x)
                if dataset.id.get_chunk_info_by_coord(offset).byte_offset is None:
                    return missing_chunk(f"at offset {offset}")
        checked.add(row)
        return None

    return missing
