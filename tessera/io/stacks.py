"""EM stacks on disk, read one section at a time.

Formats (the names :func:`open_stack` takes):

``tiff_stack``
    one multi-page TIFF, one page per section;
``slice_folder``
    a folder of per-section TIFF or PNG files, ordered by the numbers in their names;
``mrc``
    an MRC2014 file (its header carries the voxel size);
``zarr``
    an existing zarr array, or an OME-Zarr image (its level 0 and scale are used).

A reader holds one section at a time (memory maps and zarr arrays read only what is asked for).
"""

import re
from pathlib import Path

import mrcfile
import numpy as np
import tifffile
import zarr
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.containers import open_container
from tessera.io.omezarr import open_image

__all__ = ["FORMATS", "open_stack"]

FORMATS = ("tiff_stack", "slice_folder", "mrc", "zarr", "hdf5", "n5")
_SLICE_SUFFIXES = (".tif", ".tiff", ".png")


def _natural_key(path):
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", path.name)]


class _Source:
    """A stack readable section by section: ``shape``, ``dtype``, ``header_spacing``, ``read(z)``."""

    header_spacing = None

    def close(self):
        pass


class _TiffStack(_Source):
    def __init__(self, path):
        try:
            self._tif = tifffile.TiffFile(path)
        except (OSError, tifffile.TiffFileError, ValueError) as exc:
            raise TesseraInputError(f"cannot read as TIFF: {exc}", source=path) from None
        pages = self._tif.pages
        first = pages[0]
        if len(first.shape) != 2:
            self._tif.close()
            raise TesseraInputError(
                f"expected greyscale pages (2D), first page has shape {first.shape}", source=path
            )
        self.shape = (len(pages), *first.shape)
        self.dtype = np.dtype(first.dtype)
        self._path = path
        self.header_spacing = _imagej_spacing(self._tif)

    def read(self, z):
        page = self._tif.pages[z]
        if page.shape != self.shape[1:]:
            raise TesseraInputError(
                f"page {z} has shape {page.shape}, expected {self.shape[1:]} like page 0",
                source=self._path,
            )
        return page.asarray()

    def close(self):
        self._tif.close()


def _imagej_spacing(tif):
    """Voxel size in nm from ImageJ TIFF metadata, or None when not stated in a length unit."""
    meta = tif.imagej_metadata or {}
    unit = str(meta.get("unit", "")).lower()
    to_nm = {"nm": 1.0, "nanometer": 1.0, "micron": 1e3, "um": 1e3, "µm": 1e3, "\\u00b5m": 1e3}
    if unit not in to_nm or "spacing" not in meta:
        return None
    tags = tif.pages[0].tags
    try:
        yres = tags["YResolution"].value
        xres = tags["XResolution"].value
    except KeyError:
        return None
    k = to_nm[unit]
    return (float(meta["spacing"]) * k, k * yres[1] / yres[0], k * xres[1] / xres[0])


def _read_plane(path):
    if path.suffix.lower() == ".png":
        with Image.open(path) as im:
            return np.asarray(im)
    return tifffile.imread(path)


class _SliceFolder(_Source):
    def __init__(self, path):
        if not path.is_dir():
            raise TesseraInputError("expected a folder of per-section TIFF/PNG files", source=path)
        files = sorted(
            (p for p in path.iterdir() if p.suffix.lower() in _SLICE_SUFFIXES), key=_natural_key
        )
        if not files:
            raise TesseraInputError(
                f"no section images ({', '.join(_SLICE_SUFFIXES)}) in the folder", source=path
            )
        self._files = files
        first = self._read_checked(0, None)
        self.shape = (len(files), *first.shape)
        self.dtype = first.dtype

    def _read_checked(self, z, expected):
        f = self._files[z]
        try:
            plane = _read_plane(f)
        except (OSError, ValueError, tifffile.TiffFileError) as exc:
            raise TesseraInputError(f"cannot read section image: {exc}", source=f) from None
        if plane.ndim != 2:
            raise TesseraInputError(
                f"expected a greyscale image, got shape {plane.shape}", source=f
            )
        if expected is not None and plane.shape != expected:
            raise TesseraInputError(
                f"section has shape {plane.shape}, expected {expected} like {self._files[0].name}",
                source=f,
            )
        return plane

    def read(self, z):
        return self._read_checked(z, self.shape[1:])


class _Mrc(_Source):
    def __init__(self, path):
        try:
            self._mrc = mrcfile.mmap(path, mode="r", permissive=False)
        except (OSError, ValueError) as exc:
            raise TesseraInputError(f"cannot read as MRC2014: {exc}", source=path) from None
        data = self._mrc.data
        if data is None or data.ndim not in (2, 3):
            raise TesseraInputError("expected a 2D or 3D MRC image", source=path)
        self._data = data if data.ndim == 3 else data[np.newaxis]
        self.shape = self._data.shape
        self.dtype = self._data.dtype
        vs = self._mrc.voxel_size  # Å, ordered x, y, z
        zyx = (float(vs.z), float(vs.y), float(vs.x))
        self.header_spacing = tuple(v / 10.0 for v in zyx) if all(v > 0 for v in zyx) else None

    def read(self, z):
        return np.asarray(self._data[z])

    def close(self):
        self._mrc.close()


class _Zarr(_Source):
    def __init__(self, path):
        try:
            node = zarr.open(store=str(path), mode="r")
        except (FileNotFoundError, ValueError, zarr.errors.NodeTypeValidationError) as exc:
            raise TesseraInputError(f"cannot open as zarr: {exc}", source=path) from None
        if isinstance(node, zarr.Group):
            # input: checked where it carries records
            _, info = open_image(path, checksums="if-present")
            node = info["levels"][0]
            self.header_spacing = info["spacing"]
        if node.ndim != 3:
            raise TesseraInputError(
                f"expected a 3D z, y, x array, got shape {node.shape}", source=path
            )
        self._arr = node
        self.shape = node.shape
        self.dtype = np.dtype(node.dtype)

    def read(self, z):
        return self._arr[z]


_READERS = {"tiff_stack": _TiffStack, "slice_folder": _SliceFolder, "mrc": _Mrc, "zarr": _Zarr}


def open_stack(path, fmt, *, internal_path=None):
    """Open an EM stack for reading one section at a time.

    Parameters
    ----------
    path : str or Path
        File or folder of the stack.
    fmt : {'tiff_stack', 'slice_folder', 'mrc', 'zarr', 'hdf5', 'n5'}
        Its format (see the module docs; hdf5, n5 and plain zarr arrays are read by
        :mod:`tessera.io.hdf5_stacks` and :mod:`tessera.io.chunked_stacks`).
    internal_path : str, optional
        The array inside an hdf5, n5 or zarr container (required for hdf5 and n5).

    Returns
    -------
    source
        Object with ``shape`` (Z, Y, X), ``dtype``, ``header_spacing`` (nm z, y, x or None),
        ``read(z)`` returning one 2D section, and ``close()``.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     tifffile.imwrite(Path(folder) / "s.tif", np.arange(30, dtype=np.uint16).reshape(2, 3, 5))
    ...     stack = open_stack(Path(folder) / "s.tif", "tiff_stack")
    ...     print(stack.shape, stack.dtype, stack.read(1)[0].tolist())
    ...     stack.close()
    (2, 3, 5) uint16 [15, 16, 17, 18, 19]
    """
    path = Path(path)
    if fmt not in FORMATS:
        raise TesseraInputError(
            f"unknown format {fmt!r}; expected one of {', '.join(FORMATS)}", source=path
        )
    if not path.exists():
        raise TesseraInputError("file or folder not found", source=path)
    source = open_container(path, fmt, internal_path=internal_path)
    if source is None:
        source = _READERS[fmt](path)
    problem = None
    if not np.issubdtype(source.dtype, np.integer) and not np.issubdtype(source.dtype, np.floating):
        problem = f"expected integer or float pixels, got {source.dtype}"
    elif min(source.shape) < 1:
        problem = f"the stack is empty (shape {source.shape})"
    if problem:
        source.close()
        raise TesseraInputError(problem, source=path)
    return source
