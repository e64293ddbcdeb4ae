"""EM stacks stored as chunked arrays on disk: plain zarr (v2 or v3) arrays and N5 datasets.

``zarr``
    A zarr array, given by its own folder or by a container folder plus the array's path inside
    it (``internal_path``). zarr-python 3 reads both zarr v2 and v3 arrays. An OME-Zarr image
    (a group, no ``internal_path``) is read by :mod:`tessera.io.stacks` instead.
``n5``
    An N5 dataset: the container folder plus the dataset's path inside it. zarr-python 3 has no
    N5 support, so this module reads N5 itself (the N5 format: ``attributes.json`` with
    ``dimensions``, ``blockSize``, ``dataType`` and ``compression``, listed x first; one file per
    block under ``<dataset>/<i>/<j>/<k>`` holding a big-endian header and the block's elements,
    x fastest). Compression raw, gzip, bzip2, xz, blosc and zstd are read; lz4 is not.

Voxel sizes come from the array's attributes (``resolution``: nm, z, y, x for zarr and x, y, z
for N5; ``pixelResolution``; ``element_size_um``: µm z, y, x); for a zarr array without them
that is one level of a multiscale image (OME-Zarr 0.4 or 0.5), from the image's metadata in the
group above it (:func:`tessera.io.omezarr.level_spacing`). A chunk missing from the folder
reads as fill value in zarr, so it is refused rather than read as data.
"""

import bz2
import json
import lzma
import zlib
from pathlib import Path

import numcodecs
import numpy as np
import zarr

from tessera.errors import TesseraInputError
from tessera.io.array_stacks import (
    ArrayStack,
    first_problem,
    inner_parts,
    missing_chunk,
    spacing_from_attrs,
)
from tessera.io.omezarr import level_spacing
from tessera.io.zarr_checks import check_chunk_grid

__all__ = ["open_zarr_array", "open_n5"]

# zarr validates metadata with plain exceptions: a damaged zarr.json raises TypeError too
_ZARR_ERRORS = (
    OSError,
    ValueError,
    KeyError,
    TypeError,
    AttributeError,
    IndexError,
    zarr.errors.BaseZarrError,
)


def open_zarr_array(path, internal_path=None):
    """Open a plain zarr array (v2 or v3) for reading by sections; None for an OME-Zarr group.

    Parameters
    ----------
    path : str or Path
        The array's folder, or the container's when `internal_path` is given.
    internal_path : str, optional
        The array inside the container, e.g. ``volumes/raw``.

    Returns
    -------
    ArrayStack or None
        None when `path` is a group and no `internal_path` is given (an OME-Zarr image).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     group = zarr.open_group(f"{folder}/c.zarr", mode="w", zarr_format=2)
    ...     group.create_array("raw", shape=(2, 3, 4), chunks=(1, 3, 4), dtype="uint8")[:] = 7
    ...     stack = open_zarr_array(f"{folder}/c.zarr", "raw")
    ...     print(stack.shape, stack.read(1).max(), stack.header_spacing)
    ...     stack.close()
    (2, 3, 4) 7 None
    """
    path = Path(path)
    inner = "" if internal_path is None else "/".join(inner_parts(internal_path, source=path))
    label = f"{path}, internal_path {inner}" if inner else str(path)
    try:
        if not inner and isinstance(zarr.open(store=str(path), mode="r"), zarr.Group):
            return None
        array = zarr.open_array(store=str(path), path=inner, mode="r")
    except _ZARR_ERRORS as exc:
        what = f"no zarr array at internal_path {inner!r}" if inner else "cannot open as zarr"
        raise TesseraInputError(f"{what}: {exc}", source=path) from None
    check_chunk_grid(array, path)
    attrs = array.metadata.attributes
    if not isinstance(attrs, dict):
        # zarr opens the array anyway and fails later, on reading its attributes (zarr v2
        # spec: .zattrs holds a JSON object; v3 spec: "attributes" is a JSON object)
        raise TesseraInputError(
            f"the array's attributes are {type(attrs).__name__} {attrs!r:.40}, expected a JSON "
            "object (damaged .zattrs or zarr.json?)",
            source=label,
        )
    spacing, attribute = spacing_from_attrs(dict(attrs), source=label)
    if spacing is None and inner and array.ndim == 3:
        spacing, attribute = _multiscale_spacing(path, inner, label)
    return ArrayStack(
        array,
        label=label,
        errors=(zarr.errors.BaseZarrError,),
        header_spacing=spacing,
        spacing_attribute=attribute,
        chunk_problem=_zarr_chunk_check(array, path / inner) if array.ndim == 3 else None,
    )


def _multiscale_spacing(path, inner, label):
    """(voxel size, what it was read from) of an array that is one level of a multiscale image
    (OME-Zarr 0.4 or 0.5): the metadata of the nearest group above it listing it; (None, None)
    when none does, or when its axes state no unit (the sheet gives the size then)."""
    parts = inner.split("/")
    for k in range(len(parts) - 1, -1, -1):
        try:
            group = zarr.open_group(store=str(path), path="/".join(parts[:k]), mode="r")
            attrs = group.attrs.asdict()
        except _ZARR_ERRORS:
            continue
        found = level_spacing(attrs, "/".join(parts[k:]), source=label)
        if found is None:
            continue
        if not found["units_given"]:
            return None, None
        group_name = f"group {'/'.join(parts[:k])!r}" if k else "the container's top group"
        return found["spacing"], f"{found['attribute']} scale of {group_name} (converted to nm)"
    return None, None


def _grid_rows(shape, chunks):
    """Per chunk row along z: the (y, x) chunk indices of a section."""
    ny, nx = (-(-s // c) for s, c in zip(shape[1:], chunks[1:], strict=True))
    return [(j, i) for j in range(ny) for i in range(nx)]


def _zarr_chunk_check(array, folder):
    stored = array.shards or array.chunks  # the unit that is one key (file) in the store
    cells, checked = _grid_rows(array.shape, stored), set()
    blosc = not array.shards and _blosc_compressed(array)

    def missing(z):
        row = z // stored[0]
        if row in checked:
            return None
        problems = [
            _stored_chunk_problem(folder, array.metadata.encode_chunk_key((row, j, i)), blosc)
            for j, i in cells
        ]
        return first_problem(problems, row, checked)

    return missing


def _blosc_compressed(array):
    meta = array.metadata
    if getattr(meta, "zarr_format", 3) == 2:
        return isinstance(meta.compressor, numcodecs.Blosc)
    return any(isinstance(codec, zarr.codecs.BloscCodec) for codec in meta.codecs)


def _stored_chunk_problem(folder, key, blosc):
    """None when the chunk file is there (and whole, for blosc), else what is wrong."""
    file = folder / key
    if not file.is_file():
        return missing_chunk(repr(key))
    if blosc:
        # A blosc frame states its own length (bytes 12-15, little-endian; the blosc format
        # description). The decoder trusts it and reads past a short buffer without an error.
        with open(file, "rb") as fh:
            header = fh.read(16)
        stated, actual = int.from_bytes(header[12:16], "little"), file.stat().st_size
        if len(header) < 16 or stated != actual:
            return (
                f"chunk {key!r} is truncated: its blosc header states {stated} bytes, "
                f"the file has {actual}"
            )
    return None


# -- N5 ------------------------------------------------------------------------------------------

_N5_TYPES = {f"{k}{8 * n}": f">{k[0]}{n}" for k in ("uint", "int") for n in (1, 2, 4, 8)}
_N5_TYPES |= {"float32": ">f4", "float64": ">f8"}
_N5_DECODERS = {
    "raw": lambda data: data,
    "gzip": lambda data: zlib.decompress(data, wbits=47),  # gzip or zlib header, both used
    "bzip2": bz2.decompress,
    "xz": lzma.decompress,
    "blosc": lambda data: bytes(numcodecs.Blosc().decode(data)),
    "zstd": lambda data: bytes(numcodecs.Zstd().decode(data)),
}


def open_n5(path, internal_path):
    """Open the dataset `internal_path` of the N5 container `path` for reading by sections.

    Parameters
    ----------
    path : str or Path
        The N5 container folder.
    internal_path : str
        The dataset inside it, e.g. ``volumes/raw``.

    Returns
    -------
    ArrayStack
        Sections in z, y, x order (N5 lists x first; the order is reversed here).
    """
    path = Path(path)
    parts = inner_parts(internal_path, source=path)
    folder = path.joinpath(*parts)
    label = f"{path}, internal_path {'/'.join(parts)}"
    meta_file = folder / "attributes.json"
    if not meta_file.is_file():
        raise TesseraInputError(
            f"internal_path: no N5 dataset {'/'.join(parts)!r} in the container "
            f"(no {meta_file.relative_to(path)})",
            source=path,
        )
    try:
        attrs = json.loads(meta_file.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise TesseraInputError(
            f"attributes.json is not readable JSON: {exc}", source=label
        ) from None
    array = _N5Array(folder, attrs, label)
    spacing, attribute = spacing_from_attrs(attrs, xyz=True, source=label)
    return ArrayStack(
        array,
        label=label,
        header_spacing=spacing,
        spacing_attribute=attribute,
        chunk_problem=array.missing_block,
    )


class _N5Array:
    """Just enough of an array for ArrayStack: ``shape``, ``dtype``, ``[z]`` (z, y, x order)."""

    def __init__(self, folder, attrs, label):
        if not isinstance(attrs, dict):
            raise TesseraInputError("attributes.json: expected a JSON object", source=label)
        for key in ("dimensions", "blockSize", "dataType"):
            if key not in attrs:
                raise TesseraInputError(
                    f"attributes.json has no {key!r}: not an N5 dataset", source=label
                )
        kind = attrs.get("compression", {"type": attrs.get("compressionType", "raw")})
        self.compression = kind.get("type") if isinstance(kind, dict) else None
        if self.compression not in _N5_DECODERS:
            raise TesseraInputError(
                f"attributes.json: compression {kind!r} is not read here; expected one of "
                f"{', '.join(_N5_DECODERS)}",
                source=label,
            )
        if attrs["dataType"] not in _N5_TYPES:
            raise TesseraInputError(
                f"attributes.json: dataType {attrs['dataType']!r}; expected integer or float "
                f"({', '.join(_N5_TYPES)})",
                source=label,
            )
        try:
            self.shape = tuple(int(n) for n in attrs["dimensions"])[::-1]
            self.blocks = tuple(int(n) for n in attrs["blockSize"])[::-1]
        except (TypeError, ValueError):
            self.shape, self.blocks = (), ()
        if len(self.blocks) != len(self.shape) or min(self.blocks, default=0) < 1:
            raise TesseraInputError(
                f"attributes.json: dimensions {attrs['dimensions']!r} and blockSize "
                f"{attrs['blockSize']!r} must be lists of the same length, block sizes >= 1",
                source=label,
            )
        self.dtype = np.dtype(_N5_TYPES[attrs["dataType"]])
        self.ndim = len(self.shape)
        self._folder, self._label = folder, label
        self._cells = _grid_rows(self.shape, self.blocks) if self.ndim == 3 else []
        if self.ndim == 3:
            self._check_block_grid()

    def _check_block_grid(self):
        """Refuse block files beyond the grid of ``dimensions`` (the attributes state too little).

        Like zarr (:func:`tessera.io.zarr_checks.check_chunk_grid`), a reader would silently
        ignore them and return a smaller volume.
        """
        grid = [-(-n // b) for n, b in zip(self.shape, self.blocks, strict=True)]  # z, y, x
        for file in sorted(self._folder.glob("*/*/*")):
            parts = file.relative_to(self._folder).parts  # x, y, z: the N5 block path
            if not all(p.isdigit() for p in parts) or not file.is_file():
                continue
            i, j, row = (int(p) for p in parts)
            if row >= grid[0] or j >= grid[1] or i >= grid[2]:
                raise TesseraInputError(
                    f"block file {'/'.join(parts)} lies outside the block grid "
                    f"{'/'.join(map(str, grid[::-1]))} (x/y/z) of dimensions "
                    f"{list(self.shape[::-1])}: attributes.json states less than was written "
                    "(damaged or edited?)",
                    source=self._label,
                )

    def _block_file(self, row, j, i):
        return self._folder / str(i) / str(j) / str(row)  # grid position listed x first

    def missing_block(self, z):
        row = z // self.blocks[0]
        for j, i in self._cells:
            if not self._block_file(row, j, i).is_file():
                return missing_chunk(f"{i}/{j}/{row} (N5 block x/y/z)")
        return None  # cheap enough uncached: one stat per block, and blocks are read anyway

    def __getitem__(self, z):
        row, depth = divmod(z, self.blocks[0])
        section = np.zeros(self.shape[1:], dtype=self.dtype)  # an absent block reads as 0
        for j, i in self._cells:
            file = self._block_file(row, j, i)
            if not file.is_file():  # refused earlier unless missing chunks are allowed
                continue
            block = self._read_block(file, (row, j, i))
            y0, x0 = j * self.blocks[1], i * self.blocks[2]
            section[y0 : y0 + block.shape[1], x0 : x0 + block.shape[2]] = block[depth]
        return section

    def _read_block(self, file, grid):
        data = file.read_bytes()
        mode, ndim = (int.from_bytes(data[k : k + 2], "big") for k in (0, 2))
        if mode not in (0, 1) or ndim != 3 or len(data) < 4 + 4 * ndim:
            raise ValueError(f"block {file.name}: header mode {mode}, {ndim} dims, not a 3D block")
        size = [int.from_bytes(data[4 + 4 * k : 8 + 4 * k], "big") for k in range(ndim)][::-1]
        start = 4 + 4 * ndim + (4 if mode == 1 else 0)  # mode 1 also stores an element count
        expected = [
            min(b, s - g * b) for b, s, g in zip(self.blocks, self.shape, grid, strict=True)
        ]
        if any(have < want for have, want in zip(size, expected, strict=True)):
            raise ValueError(f"block {file} is {size} (z, y, x), expected at least {expected}")
        try:
            raw = _N5_DECODERS[self.compression](data[start:])
        except (OSError, EOFError, lzma.LZMAError, zlib.error, RuntimeError, ValueError) as exc:
            raise ValueError(
                f"block {file} does not decompress ({self.compression}): {exc}"
            ) from None
        count = int(np.prod(size))
        need = count * self.dtype.itemsize
        # a raw block is its header and its elements, nothing more (N5 format description), so
        # surplus bytes are damage: e.g. gzip blocks read as raw after "compression" was lost
        if len(raw) < need or (self.compression == "raw" and len(raw) != need):
            raise ValueError(f"block {file} holds {len(raw)} bytes of elements, expected {need}")
        block = np.frombuffer(raw, dtype=self.dtype, count=count).reshape(size)
        return block[: expected[0], : expected[1], : expected[2]]
