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

import contextlib
from pathlib import Path

import mrcfile
import numpy as np
import zarr
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.containers import open_container
from tessera.io.damage import check_file_size, check_section, complaints_as_errors
from tessera.io.image_files import IMAGE_READ_ERRORS, check_png_chunks
from tessera.io.omezarr import open_image
from tessera.io.section_numbers import number_sections
from tessera.io.tiff_checks import open_checked_tiff, read_checked_page
from tessera.io.zarr_checks import check_chunk_grid

__all__ = ["FORMATS", "MISSING_SECTIONS", "open_stack", "slice_folder_files"]

FORMATS = ("tiff_stack", "slice_folder", "mrc", "zarr", "hdf5", "n5")
#: What to do with a section missing from a numbered slice folder.
MISSING_SECTIONS = ("placeholder", "refuse")
_SLICE_SUFFIXES = (".tif", ".tiff", ".png")
# Image formats that are no sections here (lossy, or not read): one among the sections would
# otherwise pass as a lost section, replaced by a blank one
_OTHER_IMAGE_SUFFIXES = (".jpg", ".jpeg", ".jp2", ".bmp", ".gif", ".webp", ".dm3", ".dm4", ".mrc")
# Pillow modes that hold one grey value per pixel, stored as is
_GREY_MODES = ("L", "I", "I;16", "I;16L", "I;16B", "F")


class _Source:
    """A stack readable section by section: ``shape``, ``dtype``, ``header_spacing``, ``read(z)``.

    ``shape[0]`` counts the sections present in the source; ``missing`` lists the z (in the
    complete stack of ``shape[0] + len(missing)`` sections) that have no data.
    """

    header_spacing = None
    missing = ()

    def read(self, z):
        plane = self._read(z)
        return check_section(plane, z=z, shape=self.shape[1:], dtype=self.dtype, source=self._path)

    def close(self):
        pass


class _TiffStack(_Source):
    def __init__(self, path):
        self._tif = open_checked_tiff(path)
        first = self._tif.pages[0]
        self.shape = (len(self._tif.pages), *first.shape)
        self.dtype = np.dtype(first.dtype)
        self._path = path
        self.header_spacing = _imagej_spacing(self._tif)

    def _read(self, z):
        return read_checked_page(self._tif, z, self._path)

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
    if path.suffix.lower() != ".png":
        with contextlib.closing(open_checked_tiff(path)) as tif:
            if len(tif.pages) != 1:
                raise TesseraInputError(
                    f"expected one page per section file, found {len(tif.pages)}", source=path
                )
            return read_checked_page(tif, 0, path)
    check_png_chunks(path)
    with complaints_as_errors(path, what="cannot read section image", loggers=("PIL",)):
        with Image.open(path) as im:
            if im.mode not in _GREY_MODES:
                raise TesseraInputError(
                    f"expected a greyscale image (mode {', '.join(_GREY_MODES)}), got mode "
                    f"{im.mode}",
                    source=path,
                )
            return np.asarray(im)


def slice_folder_files(path):
    """The files of a slice folder that reading it looks at, sorted: its image files, hidden
    ones left out. Sections are read from the TIFF and PNG files among them; an image of
    another kind is refused (it may be a section saved in the wrong format). Other files (notes,
    macOS ``.DS_Store``) are not looked at, so adding or editing them changes nothing.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> for name in ("s1.tif", "._s1.tif", ".DS_Store", "notes.txt", "s2.PNG"):
    ...     _ = (d / name).write_bytes(b"")
    >>> [p.name for p in slice_folder_files(d)]
    ['s1.tif', 's2.PNG']
    """
    # hidden files are no sections: macOS leaves '._<name>' metadata copies beside every
    # file it writes to a shared drive, and editors leave '.<name>' backups (common practice)
    suffixes = _SLICE_SUFFIXES + _OTHER_IMAGE_SUFFIXES
    return sorted(
        p
        for p in Path(path).iterdir()
        if p.suffix.lower() in suffixes and not p.name.startswith(".")
    )


class _SliceFolder(_Source):
    def __init__(self, path, missing_sections):
        if not path.is_dir():
            raise TesseraInputError("expected a folder of per-section TIFF/PNG files", source=path)
        files = slice_folder_files(path)
        names = [p.name for p in files if p.suffix.lower() in _SLICE_SUFFIXES]
        if not names:
            raise TesseraInputError(
                f"no section images ({', '.join(_SLICE_SUFFIXES)}) in the folder", source=path
            )
        others = [p.name for p in files if p.suffix.lower() in _OTHER_IMAGE_SUFFIXES]
        if others:
            raise TesseraInputError(
                f"{_short_list(others)}: image file(s) of a kind sections are not read from, "
                f"beside the sections; expected every section as {', '.join(_SLICE_SUFFIXES)} "
                "(save it again as TIFF, or move it out of the folder)",
                source=path,
            )
        order = number_sections(names, source=path)
        if order["missing"] and missing_sections == "refuse":
            lost = [order["numbers"][z] for z in order["missing"]]
            raise TesseraInputError(
                f"section number(s) {_short_list(lost)} missing from the sequence "
                f"{order['numbers'][0]}..{order['numbers'][-1]}: expected "
                f"{len(order['numbers'])} sections, found {len(names)} files; set "
                "ingest.missing_sections: placeholder to ingest them as excluded blank sections",
                source=path,
            )
        self._path = path
        self._files = [path / name for name in order["names"]]
        self.missing = tuple(order["missing"])
        first = self._read_checked(0)
        self.shape = (len(self._files), *first.shape)
        self.dtype = first.dtype

    def _read_checked(self, z):
        f = self._files[z]
        try:
            plane = _read_plane(f)
        except TesseraInputError:
            raise
        except IMAGE_READ_ERRORS as exc:
            raise TesseraInputError(f"cannot read section image: {exc}", source=f) from None
        if plane.ndim != 2:
            raise TesseraInputError(
                f"expected a greyscale image, got shape {plane.shape}", source=f
            )
        return plane

    def read(self, z):
        plane = self._read_checked(z)
        if plane.shape != self.shape[1:]:
            raise TesseraInputError(
                f"section has shape {plane.shape}, expected {self.shape[1:]} like "
                f"{self._files[0].name}",
                source=self._files[z],
            )
        return check_section(
            plane, z=z, shape=self.shape[1:], dtype=self.dtype, source=self._files[z]
        )


def _short_list(values, limit=10):
    shown = ", ".join(str(v) for v in values[:limit])
    return shown + (f", ... ({len(values)} in all)" if len(values) > limit else "")


class _Mrc(_Source):
    def __init__(self, path):
        self._path = path
        _check_mrc_header(path)
        try:
            with complaints_as_errors(path, what="cannot read as MRC2014", loggers=()):
                self._mrc = mrcfile.mmap(path, mode="r", permissive=False)
        except TesseraInputError:
            raise
        except (OSError, ValueError) as exc:
            raise TesseraInputError(f"cannot read as MRC2014: {exc}", source=path) from None
        data = self._mrc.data
        if data is None or data.ndim not in (2, 3):
            self._mrc.close()
            raise TesseraInputError("expected a 2D or 3D MRC image", source=path)
        self._data = data if data.ndim == 3 else data[np.newaxis]
        if stamped_unsigned_bytes(self._mrc.header):
            self._data = self._data.view(np.uint8)
        self.shape = self._data.shape
        self.dtype = self._data.dtype
        vs = self._mrc.voxel_size  # Å, ordered x, y, z
        zyx = (float(vs.z), float(vs.y), float(vs.x))
        self.header_spacing = tuple(v / 10.0 for v in zyx) if all(v > 0 for v in zyx) else None

    def _read(self, z):
        return np.asarray(self._data[z])

    def close(self):
        self._mrc.close()


# A writer's stamp some MRC headers carry (bytes 152-155, a 32-bit integer), and the bit of the
# flags after it (bytes 156-159) saying that its mode-0 bytes are signed (common practice, from
# memory: that writer's own description of its header)
_WRITER_STAMP = 1146047817
_SIGNED_BYTES_FLAG = 1
_STAMP_WORDS = slice(152 - 112, 160 - 112)  # within mrcfile's `extra2` field, which starts at 112


def stamped_unsigned_bytes(header):
    """Whether an MRC header's mode-0 data are unsigned bytes, as its writer's stamp says.

    MRC2014 defines mode 0 as signed 8-bit integers, but a widely used writer of EM data in this
    format stores unsigned bytes there unless bit 0 of its flags is set, and marks its headers
    with a stamp (:data:`_WRITER_STAMP`). Read as signed, grey values above 127 would wrap around to negative.

    Parameters
    ----------
    header : numpy.record
        An MRC header as mrcfile reads it.

    Returns
    -------
    bool
        True for mode 0 under that stamp with the signed-bytes flag clear.
    """
    if int(header["mode"]) != 0:
        return False
    words = np.frombuffer(bytes(header["extra2"])[_STAMP_WORDS], dtype=header["nx"].dtype)
    stamp, flags = int(words[0]), int(words[1])
    return stamp == _WRITER_STAMP and not flags & _SIGNED_BYTES_FLAG


def _check_mrc_header(path):
    """Refuse an MRC file whose size or axis order disagrees with its header (nx, ny, nz, mode)."""
    try:
        with complaints_as_errors(path, what="cannot read the MRC2014 header", loggers=()):
            with mrcfile.open(path, mode="r", permissive=True, header_only=True) as mrc:
                header = mrc.header
        if header is None:
            raise ValueError("no header")
        nx, ny, nz, mode = (int(header[k]) for k in ("nx", "ny", "nz", "mode"))
        axes = tuple(int(header[k]) for k in ("mapc", "mapr", "maps"))
        extended = int(header["nsymbt"])
        dtype = mrcfile.utils.dtype_from_mode(mode)
    except TesseraInputError:
        raise
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise TesseraInputError(f"cannot read the MRC2014 header: {exc}", source=path) from None
    if min(nx, ny, nz) < 1 or extended < 0:
        raise TesseraInputError(
            f"header says nx={nx}, ny={ny}, nz={nz}, nsymbt={extended}: expected sizes >= 1 "
            "and an extended header >= 0 bytes (damaged header?)",
            source=path,
        )
    if axes != (1, 2, 3):
        raise TesseraInputError(
            f"header says axis order mapc, mapr, maps = {axes}, expected (1, 2, 3) "
            "(columns x, rows y, sections z); reorder the file first",
            source=path,
        )
    data_bytes = nx * ny * nz * dtype.itemsize
    check_file_size(
        path,
        1024 + extended + data_bytes,
        layout=f"nx={nx}, ny={ny}, nz={nz}, mode {mode} ({dtype.name}) after 1024 + {extended} "
        "header bytes",
    )


# What zarr raises for metadata or chunks it cannot parse (it validates with plain exceptions).
_ZARR_ERRORS = (
    OSError,
    ValueError,
    TypeError,
    KeyError,
    IndexError,
    AttributeError,
    RuntimeError,
    zarr.errors.BaseZarrError,
)


class _Zarr(_Source):
    def __init__(self, path):
        self._path = path
        try:
            with complaints_as_errors(path, what="cannot open as zarr", loggers=()):
                node = zarr.open(store=str(path), mode="r")
        except TesseraInputError:
            raise
        except _ZARR_ERRORS as exc:
            raise TesseraInputError(
                f"cannot open as zarr: {type(exc).__name__}: {exc}", source=path
            ) from None
        if isinstance(node, zarr.Group):
            _check_ome_zarr_group(node, path)
            # input: checked where it carries records
            _, info = open_image(path, checksums="if-present")
            node = info["levels"][0]
            if info["units_given"]:
                # held to the sheet's voxel sizes as container attributes are (merge_spacing)
                self.header_spacing = info["spacing"]
                self.spacing_attribute = "ome.multiscales scale (converted to nm)"
                self.label = str(path)
        if node.ndim != 3:
            raise TesseraInputError(
                f"expected a 3D z, y, x array, got shape {node.shape}", source=path
            )
        check_chunk_grid(node, path)
        self._arr = node
        self.shape = node.shape
        self.dtype = np.dtype(node.dtype)

    def _read(self, z):
        try:
            return self._arr[z]
        except _ZARR_ERRORS as exc:
            raise TesseraInputError(
                f"cannot read section {z}: {type(exc).__name__}: {exc}", source=self._path
            ) from None


def _check_ome_zarr_group(group, path, *, limit=10):
    """Refuse a zarr group that is not an OME-Zarr 0.5 image, naming the arrays it holds.

    OME-Zarr 0.5 images are zarr v3 groups with an ``ome`` attribute (OME-NGFF 0.5
    specification); any other group needs the array named in column internal_path.
    """
    attrs = group.attrs.asdict()
    if group.metadata.zarr_format == 3 and "ome" in attrs:
        return
    arrays = [name for name, node in group.members(max_depth=None) if isinstance(node, zarr.Array)]
    held = (
        f"it holds the arrays {_short_list(sorted(arrays), limit)}"
        if arrays
        else "it holds no array"
    )
    kind = (
        "an OME-Zarr image of version 0.4 or older (zarr v2); only 0.5 images are read whole"
        if "multiscales" in attrs
        else f"a zarr v{group.metadata.zarr_format} group, not an OME-Zarr 0.5 image"
    )
    raise TesseraInputError(
        f"{kind}; set column internal_path to the array to read ({held})", source=path
    )


_READERS = {"tiff_stack": _TiffStack, "slice_folder": _SliceFolder, "mrc": _Mrc, "zarr": _Zarr}


def open_stack(path, fmt, *, internal_path=None, missing_sections="refuse"):
    """Open an EM stack for reading one section at a time.

    Every reader checks the file whole before the first section is used (page counts against
    the file's own metadata, header sizes against the file size, numbering gaps in a slice
    folder) and turns every reader warning into an error, so a damaged file is refused rather
    than read as a shorter or altered stack.

    Parameters
    ----------
    path : str or Path
        File or folder of the stack.
    fmt : {'tiff_stack', 'slice_folder', 'mrc', 'zarr', 'hdf5', 'n5'}
        Its format (see the module docs; hdf5, n5 and plain zarr arrays are read by
        :mod:`tessera.io.hdf5_stacks` and :mod:`tessera.io.chunked_stacks`).
    internal_path : str, optional
        The array inside an hdf5, n5 or zarr container (required for hdf5 and n5).
    missing_sections : {'refuse', 'placeholder'}, optional
        A slice folder whose numbering has gaps is refused, or opened with the missing
        sections listed in ``missing``.

    Returns
    -------
    source
        Object with ``shape`` (Z, Y, X) of the sections present, ``missing`` (z of the sections
        lacking, in the complete stack of Z + len(missing)), ``dtype``, ``header_spacing``
        (nm z, y, x or None), ``read(z)`` returning the z-th present section, and ``close()``.

    Examples
    --------
    >>> import tempfile
    >>> import tifffile
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
    if missing_sections not in MISSING_SECTIONS:
        raise TesseraInputError(
            f"missing_sections must be one of {', '.join(MISSING_SECTIONS)}, "
            f"got {missing_sections!r}"
        )
    if not path.exists():
        raise TesseraInputError("file or folder not found", source=path)
    source = open_container(path, fmt, internal_path=internal_path)
    if source is None:
        if fmt == "slice_folder":
            source = _SliceFolder(path, missing_sections)
        else:
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
