"""Ingest an EM stack into an OME-Zarr 0.5 image, one section at a time.

Supported sources (the sheet's ``format`` column):

``tiff_stack``
    one multi-page TIFF, one page per section;
``slice_folder``
    a folder of per-section TIFF or PNG files, ordered by the numbers in their names;
``mrc``
    an MRC2014 file (voxel size from its header when the sheet leaves it blank);
``zarr``
    an existing zarr array, or an OME-Zarr image (its level 0 and scale are used).

Nothing here holds more than ``chunk_z`` sections in memory. Data other than 8-bit are mapped to
uint8 by robust percentiles estimated on a strided sample, and the mapping is recorded.
"""

import re
from pathlib import Path

import numpy as np
import tifffile
import zarr

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.omezarr import AXES, multiscale_attrs
from tessera.io.store_checksums import record_checksums

FORMATS = ("tiff_stack", "slice_folder", "mrc", "zarr")
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
        from PIL import Image

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
        import mrcfile

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
            from tessera.io.omezarr import open_image

            _, info = open_image(
                path, checksums="if-present"
            )  # input: checked where it carries records
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


def open_stack(path, fmt):
    """Open an EM stack for reading one section at a time.

    Parameters
    ----------
    path : str or Path
        File or folder, as named in the datasets sheet.
    fmt : {'tiff_stack', 'slice_folder', 'mrc', 'zarr'}

    Returns
    -------
    source
        Object with ``shape`` (Z, Y, X), ``dtype``, ``header_spacing`` (nm z, y, x or None),
        ``read(z)`` returning one 2D section, and ``close()``.
    """
    path = Path(path)
    if fmt not in _READERS:
        raise TesseraInputError(
            f"unknown format {fmt!r}; expected one of {', '.join(FORMATS)}", source=path
        )
    if not path.exists():
        raise TesseraInputError("file or folder not found", source=path)
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


def resolve_spacing(sheet_spacing, header_spacing, *, source=None):
    """Voxel size per axis: the sheet's value where given, else the file header's.

    Parameters
    ----------
    sheet_spacing : sequence of 3 (float or None)
        From the datasets sheet, z, y, x in nm; None where left blank.
    header_spacing : sequence of 3 float or None
        From the file header, if the format carries one.

    Examples
    --------
    >>> resolve_spacing((50.0, None, None), (45.0, 4.6, 4.6))
    (50.0, 4.6, 4.6)
    """
    out = []
    for axis, given, fallback in zip("zyx", sheet_spacing, header_spacing or (None,) * 3):
        value = given if given is not None else fallback
        if value is None:
            raise TesseraInputError(
                f"voxel size along {axis} is blank in the sheet and the file header has none; "
                f"fill voxel_{axis}_nm (nm, > 0)",
                source=source,
            )
        if not value > 0:
            raise TesseraInputError(
                f"voxel size along {axis} must be > 0 nm, got {value}", source=source
            )
        out.append(float(value))
    return tuple(out)


def estimate_intensity_range(source, *, percentiles=(0.1, 99.9), max_samples=2_000_000):
    """Robust grey-value range of a stack, plus its exact extremes, in one pass.

    Every section is read once; percentiles come from a strided sample of each, the extremes
    from all pixels.

    Returns
    -------
    dict
        ``low`` and ``high`` (the values at the two `percentiles`, in percent), ``min``, ``max``.
    """
    z_count, y_count, x_count = source.shape
    per_section = max(1, max_samples // z_count)
    stride = max(1, int(np.sqrt(y_count * x_count / per_section)))
    samples, lows, highs = [], [], []
    for z in range(z_count):
        section = np.asarray(source.read(z))
        finite = (
            section if np.issubdtype(section.dtype, np.integer) else section[np.isfinite(section)]
        )
        if finite.size:
            lows.append(float(finite.min()))
            highs.append(float(finite.max()))
        sample = section[::stride, ::stride].ravel().astype(np.float64)
        samples.append(sample[np.isfinite(sample)])
    values = np.concatenate(samples)
    if values.size == 0:
        raise TesseraInputError("the stack holds no finite pixel values")
    low, high = np.percentile(values, percentiles)
    return {"low": float(low), "high": float(high), "min": min(lows), "max": max(highs)}


def choose_mapping(source, *, percentiles=(0.1, 99.9)):
    """How to bring a stack to uint8: None for uint8 data, else a recorded mapping.

    Integer data whose values all lie in 0..255 (8-bit data saved in a wider type, common in
    MRC files) are copied exactly; anything else is stretched so the two percentiles map to 0
    and 255.
    """
    if source.dtype == np.uint8:
        return None
    stats = estimate_intensity_range(source, percentiles=percentiles)
    mapping = {"source_dtype": str(source.dtype), "percentiles": [float(p) for p in percentiles]}
    if np.issubdtype(source.dtype, np.integer) and stats["min"] >= 0 and stats["max"] <= 255:
        return mapping | {"method": "exact", "low": 0.0, "high": 255.0}
    return mapping | {"method": "percentile stretch", "low": stats["low"], "high": stats["high"]}


def to_uint8(section, low, high):
    """Map grey values linearly so `low` → 0 and `high` → 255, clipping outside; uint8 out.

    Examples
    --------
    >>> to_uint8(np.array([[0, 1000, 2000, 4000]], dtype=np.uint16), 1000, 3000)
    array([[  0,   0, 128, 255]], dtype=uint8)
    """
    section = np.asarray(section, dtype=np.float32)
    scale = 255.0 / max(high - low, np.finfo(np.float32).eps)
    mapped = (section - np.float32(low)) * np.float32(scale)
    return np.rint(np.clip(np.nan_to_num(mapped, nan=0.0), 0, 255)).astype(np.uint8)


def ingest_stack(
    source_path,
    out_path,
    *,
    fmt,
    spacing=(None, None, None),
    name="raw",
    chunks=(1, 512, 512),
    percentiles=(0.1, 99.9),
):
    """Convert an EM stack into a single-level OME-Zarr 0.5 image of uint8 sections.

    Parameters
    ----------
    source_path : str or Path
        The stack (see module docs for formats).
    out_path : str or Path
        The OME-Zarr store to create; written under a temporary name and renamed.
    fmt : str
        One of ``FORMATS``.
    spacing : sequence of 3 (float or None), optional
        Voxel size z, y, x in nm; None takes the value from the file header.
    name : str, optional
        Image name stored in the metadata.
    chunks : sequence of 3 int, optional
        Zarr chunk shape z, y, x (clipped to the image).
    percentiles : pair of float, optional
        Percentiles (in percent) mapped to 0 and 255 for data that are not uint8.

    Returns
    -------
    dict
        Summary: shape, spacing, source dtype and the intensity mapping used (None for uint8).
    """
    source = open_stack(source_path, fmt)
    try:
        spacing = resolve_spacing(spacing, source.header_spacing, source=source_path)
        lo_p, hi_p = percentiles
        if not 0 <= lo_p < hi_p <= 100:
            raise TesseraInputError(
                f"percentiles must satisfy 0 <= low < high <= 100, got {percentiles}"
            )
        mapping = choose_mapping(source, percentiles=(lo_p, hi_p))
        chunks = tuple(int(min(c, s)) for c, s in zip(chunks, source.shape))
        extra = {"source": {"path": str(source_path), "format": fmt}, "intensity_mapping": mapping}
        with atomic_path(out_path) as tmp:
            group = zarr.open_group(store=str(tmp), mode="w", zarr_format=3)
            group.attrs.update(
                {
                    "ome": multiscale_attrs(name=name, spacing=spacing, factors=[(1, 1, 1)]),
                    "tessera": extra,
                }
            )
            array = group.create_array(
                name="0", shape=source.shape, chunks=chunks, dtype="uint8", dimension_names=AXES
            )
            _copy_sections(source, array, chunks[0], mapping)
            record_checksums(tmp)
    finally:
        source.close()
    return {"shape": list(source.shape), "spacing": list(spacing), "intensity_mapping": mapping}


def _copy_sections(source, array, chunk_z, mapping, *, buffer_bytes=32 * 2**20):
    # Write whole chunk-rows of sections, several at once when they are small (zarr writes the
    # chunks of one call concurrently), but never buffer more than about `buffer_bytes`.
    z_count = source.shape[0]
    section_bytes = source.shape[1] * source.shape[2]
    slab_z = chunk_z * max(1, buffer_bytes // (chunk_z * section_bytes))
    for z0 in range(0, z_count, slab_z):
        z1 = min(z0 + slab_z, z_count)
        slab = np.empty((z1 - z0, *source.shape[1:]), dtype=np.uint8)
        for i, z in enumerate(range(z0, z1)):
            section = source.read(z)
            if mapping is None or mapping["method"] == "exact":
                slab[i] = section
            else:
                slab[i] = to_uint8(section, mapping["low"], mapping["high"])
        array[z0:z1] = slab
