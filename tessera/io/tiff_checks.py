"""A multi-page TIFF checked whole before its first section is used.

A TIFF cut short loses its last pages silently: the page chain simply ends early. Bit damage in
the page directories can move a page's pixels onto another page's directory or past the end of
the file. :func:`open_checked_tiff` therefore checks, with every reader complaint an error:

- the number of pages against the file's own description where it has one (ImageJ ``images=``
  or ``slices=``/``channels=``/``frames=``, OME-XML ``SizeZ x SizeC x SizeT``, tifffile's
  ``{"shape": ...}``);
- that the description states no axis besides z, y and x: pages of several channels, or of
  several time points of a z stack, follow each other and would read as extra sections;
- that every page is a greyscale plane laid out like page 0 (shape, pixel type, compression,
  predictor, bit order);
- that every page's pixel data lie inside the file, are large enough for an uncompressed page,
  and overlap neither another page's pixels nor a page directory.
"""

import contextlib
import lzma
import math
import struct
import xml.etree.ElementTree as ET
import zlib

import numpy as np
import tifffile

from tessera.errors import TesseraInputError
from tessera.io.damage import complaints_as_errors, reader_complaints

__all__ = [
    "expected_page_count",
    "open_checked_tiff",
    "other_axes",
    "read_checked_page",
    "read_checked_tiff",
]

# What tifffile raises on malformed structures besides its own error (found by fuzzing). Without
# imagecodecs, tifffile decodes deflate and LZMA pages (TIFF compression 8, 32946, 34925) with
# Python's zlib and lzma, whose errors for a damaged stream are not ValueError or OSError.
_READ_ERRORS = (
    OSError,
    ValueError,
    IndexError,
    KeyError,
    TypeError,
    AttributeError,
    ArithmeticError,
    struct.error,
    zlib.error,
    lzma.LZMAError,
    tifffile.TiffFileError,
)
# page fields that must agree with page 0 so that every page decodes the same way
_LAYOUT = (
    "shape",
    "dtype",
    "compression",
    "predictor",
    "fillorder",
    "planarconfig",
    "photometric",
    "bitspersample",
    "samplesperpixel",
)


def expected_page_count(tif, plane_size):
    """Page counts stated by the file's own metadata, as ``{where: count}``.

    Parameters
    ----------
    tif : tifffile.TiffFile
    plane_size : int
        Pixels per page (y * x), to turn a stated array shape into a number of pages.

    Returns
    -------
    dict
        ``"ImageJ description"``, ``"OME-XML"`` and/or ``"shape description"`` mapped to the
        page count each states; empty when the file states none.

    Raises
    ------
    TesseraInputError
        When the OME-XML cannot be parsed.

    Examples
    --------
    >>> import io
    >>> buf = io.BytesIO()
    >>> tifffile.imwrite(buf, np.zeros((4, 2, 3), np.uint8), photometric="minisblack")
    >>> with tifffile.TiffFile(io.BytesIO(buf.getvalue())) as tif:
    ...     expected_page_count(tif, 6)
    {'shape description': 4}
    """
    found = {}
    meta = tif.imagej_metadata
    if meta:
        if "images" in meta:
            found["ImageJ description"] = int(meta["images"])
        elif any(k in meta for k in ("slices", "channels", "frames")):
            found["ImageJ description"] = math.prod(
                int(meta.get(k, 1)) for k in ("slices", "channels", "frames")
            )
    if tif.is_ome:
        found["OME-XML"] = _ome_planes(tif.ome_metadata)
    if tif.is_shaped and tif.shaped_metadata:
        pixels = sum(math.prod(int(n) for n in m.get("shape", ())) for m in tif.shaped_metadata)
        # not a whole number of planes: -1, so that it cannot match
        found["shape description"] = pixels // plane_size if pixels % plane_size == 0 else -1
    return found


def other_axes(tif):
    """What the file's description states besides one z stack of greyscale planes, or None.

    Channels are stored as pages of their own, and so are the time points of a z stack, one
    after the other (ImageJ hyperstacks, OME-TIFF, tifffile's shape description): read page by
    page they would interleave with the sections. A stack described along one axis only (an
    ImageJ stack of frames, an OME-TIFF of SizeC planes, which tifffile writes for an array
    without named axes) is one sequence of planes and passes; so does one of ImageJ slices.
    ImageJ channels are refused even alone: ImageJ states them only for a multichannel image.

    Parameters
    ----------
    tif : tifffile.TiffFile

    Returns
    -------
    str or None
        E.g. ``"the ImageJ description states 2 channels"``; None when only z is stated.

    Examples
    --------
    >>> import io
    >>> buf = io.BytesIO()
    >>> tifffile.imwrite(buf, np.zeros((3, 2, 4, 4), np.uint8), imagej=True,
    ...                  metadata={"axes": "ZCYX"})
    >>> with tifffile.TiffFile(io.BytesIO(buf.getvalue())) as tif:
    ...     other_axes(tif)
    'the ImageJ description states 2 channels'
    """
    meta = tif.imagej_metadata
    if meta:
        channels, slices, frames = (int(meta.get(k, 1)) for k in ("channels", "slices", "frames"))
        if channels > 1:
            return f"the ImageJ description states {channels} channels"
        if slices > 1 and frames > 1:
            return f"the ImageJ description states {frames} time points of {slices} slices"
    if tif.is_ome:
        found = _ome_other_axes(tif.ome_metadata)
        if found:
            return found
    if tif.is_shaped and tif.shaped_metadata:
        for m in tif.shaped_metadata:
            shape = [int(n) for n in m.get("shape", ())]
            axes = str(m.get("axes", ""))
            stated = f"shape {tuple(shape)}" + (f" (axes {axes})" if axes else "")
            leading = list(zip(axes or "?" * len(shape), shape, strict=False))[:-2]
            if sum(n > 1 for _, n in leading) > 1 or any(a in "CS" and n > 1 for a, n in leading):
                return f"the shape description states {stated}"
    return None


def _ome_other_axes(xml):
    try:
        root = ET.fromstring(xml)
    except ET.ParseError:
        return None  # refused by the page count check
    for element in root.iter():
        if element.tag.rsplit("}", 1)[-1] == "Pixels":
            sizes = {k: element.get(f"Size{k}", "1") for k in "ZCT"}
            if not all(v.isdigit() for v in sizes.values()):
                return None  # refused by the page count check
            if sum(int(v) > 1 for v in sizes.values()) > 1:
                stated = ", ".join(f"Size{k}={v}" for k, v in sizes.items())
                return f"the OME-XML states {stated}"
    return None


def _shaped_plane(tif):
    """The (y, x) of the last two axes in tifffile's shape description, or None."""
    if not (tif.is_shaped and tif.shaped_metadata):
        return None
    shape = tif.shaped_metadata[0].get("shape", ())
    return tuple(int(n) for n in shape[-2:]) if len(shape) >= 2 else None


def _ome_planes(xml):
    try:
        root = ET.fromstring(xml)
    except ET.ParseError as exc:
        raise TesseraInputError(f"the OME-XML description cannot be parsed ({exc})") from None
    total = 0
    for element in root.iter():
        if element.tag.rsplit("}", 1)[-1] == "Pixels":
            try:
                total += math.prod(int(element.get(k, "1")) for k in ("SizeZ", "SizeC", "SizeT"))
            except ValueError:
                raise TesseraInputError(
                    "the OME-XML Pixels element has a size that is not a whole number"
                ) from None
    return total


def open_checked_tiff(path):
    """Open a multi-page greyscale TIFF and check it whole (see the module docs).

    Parameters
    ----------
    path : Path

    Returns
    -------
    tifffile.TiffFile
        Open; the caller closes it. Its pages are all usable with :func:`read_checked_page`.

    Raises
    ------
    TesseraInputError
        Naming the file, what was expected and what was found.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> f = Path(tempfile.mkdtemp()) / "s.tif"
    >>> tifffile.imwrite(f, np.zeros((12, 8, 8), np.uint8), photometric="minisblack")
    >>> _ = f.write_bytes(f.read_bytes()[: f.stat().st_size // 2])  # cut short in copying
    >>> open_checked_tiff(f)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: ...s.tif: page directories damaged or cut short after ... readable page(s) (...); the shape description states 12 pages (truncated or damaged?)
    """
    tif = None
    try:
        with complaints_as_errors(path, what="cannot read as TIFF"):
            tif = tifffile.TiffFile(path)
    except TesseraInputError:
        if tif is not None:
            tif.close()
        raise
    except _READ_ERRORS as exc:
        raise TesseraInputError(f"cannot read as TIFF: {exc}", source=path) from None
    try:
        _check_whole(tif, path)
    except BaseException:
        tif.close()
        raise
    return tif


def _written_truncated(tif):
    """Whether tifffile wrote the file with one page directory for the whole stack: its shape
    description then says so (``"truncated": true``)."""
    try:
        return any(bool(m.get("truncated")) for m in tif.shaped_metadata or ())
    except (AttributeError, TypeError, ValueError):
        return False


def _check_whole(tif, path):
    pages, problem = _list_pages(tif)
    if not pages:
        raise TesseraInputError(
            f"cannot read as TIFF: no readable image page ({problem or 'the file has none'})",
            source=path,
        )
    first = pages[0]
    if len(first.shape) != 2:
        raise TesseraInputError(
            f"expected greyscale pages (2D), first page has shape {first.shape}", source=path
        )
    if first.dtype is None:
        raise TesseraInputError(
            f"pixel type not readable: {first.bitspersample} bits per sample, sample format "
            f"{first.sampleformat}",
            source=path,
        )
    stated, unclear = _stated_counts(tif, first.shape[0] * first.shape[1])
    plane = None if unclear else _shaped_plane(tif)
    if plane is not None and plane != tuple(first.shape):
        # tifffile drops axes of length 1 when it writes, so a (z, y, 1) array is stored as
        # z x y pages: read page by page it would come back transposed
        raise TesseraInputError(
            f"the shape description states sections of shape {plane}, the pages have shape "
            f"{tuple(first.shape)}; expected one section per page",
            source=path,
        )
    said = "".join(f"; the {where} states {count} pages" for where, count in stated.items())
    if problem:
        raise TesseraInputError(
            f"page directories damaged or cut short after {len(pages)} readable page(s) "
            f"({problem}){said} (truncated or damaged?)",
            source=path,
        )
    if unclear:
        raise TesseraInputError(f"cannot read the file's description: {unclear}", source=path)
    for where, count in stated.items():
        if count == -1:  # the stated shapes hold no whole number of sections like page 0
            stated_shapes = [tuple(m.get("shape", ())) for m in tif.shaped_metadata]
            shapes = ", ".join(str(sh) for sh in dict.fromkeys(stated_shapes))
            raise TesseraInputError(
                f"the shape description states arrays of shape {shapes}, not a whole number of "
                f"sections of page 0's {first.shape[0]} x {first.shape[1]} pixels; expected one "
                "stack of sections of one size",
                source=path,
            )
        if count != len(pages) and _written_truncated(tif):
            raise TesseraInputError(
                f"the {where} states {count} pages, and the file holds one page directory for "
                "all of them (tifffile's truncate=True), so its sections cannot be checked one "
                "by one; expected an ordinary multi-page TIFF (save it again without "
                "truncate=True)",
                source=path,
            )
        if count != len(pages):
            raise TesseraInputError(
                f"the {where} states {count} pages, the file has {len(pages)} "
                "(truncated or damaged?)",
                source=path,
            )
    other = other_axes(tif)
    if other:
        meta = tif.imagej_metadata or {}
        # ImageJ writers label the pages of a plain 3D array as channels unless told its axes
        only_channels = int(meta.get("channels", 1)) == len(pages) and "slices" not in meta
        hint = (
            "; if the pages are z sections, save the stack with ImageJ axes ZYX (slices, "
            "e.g. tifffile's metadata={'axes': 'ZYX'})"
            if only_channels
            else ""
        )
        raise TesseraInputError(
            f"{other}; expected one page per z section of one greyscale channel (save one "
            f"channel or time point as a stack of its own){hint}",
            source=path,
        )
    layout0 = [getattr(first, k) for k in _LAYOUT]
    for z, page in enumerate(pages[1:], start=1):
        _check_layout(page, z, layout0, path)
    _check_extents(tif, pages, path)


def _stated_counts(tif, plane_size):
    """:func:`expected_page_count` and the first complaint or error on the way (or None)."""
    try:
        with reader_complaints() as complaints:
            stated = expected_page_count(tif, plane_size)
    except (TesseraInputError, *_READ_ERRORS) as exc:
        return {}, str(exc)
    return stated, (complaints[0] if complaints else None)


def _list_pages(tif):
    """The pages tifffile can reach, and the first complaint or error on the way (or None)."""
    pages, problem = [], None
    tif.pages.cache = True  # parse each directory once: the pages checked are the pages read
    try:
        with reader_complaints() as complaints:
            for page in tif.pages:
                pages.append(page)
    except _READ_ERRORS as exc:
        problem = f"{type(exc).__name__}: {exc}"
    if complaints and problem is None:
        problem = complaints[0]
    return pages, problem


def _check_layout(page, z, layout0, path):
    for key, want in zip(_LAYOUT, layout0, strict=True):
        got = getattr(page, key)
        if got != want:
            raise TesseraInputError(
                f"page {z} has {key} {got}, expected {want} like page 0", source=path
            )


def _check_extents(tif, pages, path):
    size = path.stat().st_size
    fmt = tif.tiff
    used = [(0, 16 if fmt.is_bigtiff else 8, "the file header")]  # (start, end, what)
    for z, page in enumerate(pages):
        ifd_end = page.offset + fmt.tagnosize + len(page.tags) * fmt.tagsize + fmt.offsetsize
        used.append((page.offset, ifd_end, f"the directory of page {z}"))
        used.extend(
            (tag.valueoffset, tag.valueoffset + tag.valuebytecount, f"tag {tag.name} of page {z}")
            for tag in page.tags.values()
            if tag.valuebytecount > fmt.tagoffsetthreshold  # stored outside the directory
        )
        need = _plane_bytes(page) if page.compression == 1 else 0
        total = 0
        for offset, count in zip(page.dataoffsets, page.databytecounts, strict=True):
            if count == 0:
                continue
            if offset + count > size:
                raise TesseraInputError(
                    f"the pixels of page {z} end at byte {offset + count}, the file has {size} "
                    "(truncated or damaged?)",
                    source=path,
                )
            used.append((offset, offset + count, f"the pixels of page {z}"))
            total += count
        if total < need:
            raise TesseraInputError(
                f"page {z} stores {total} bytes of pixels, expected at least {need} for an "
                f"uncompressed {page.shape[0]} x {page.shape[1]} {page.dtype} plane "
                "(truncated or damaged?)",
                source=path,
            )
    used.sort()
    reach = None  # (end, what) of the range reaching furthest so far
    for start, end, what in used:
        if reach is not None and start < reach[0] and "pixels" in what + reach[1]:
            raise TesseraInputError(
                f"{reach[1]} and {what} overlap in the file; expected separate bytes "
                "(damaged offsets?)",
                source=path,
            )
        if reach is None or end > reach[0]:
            reach = (end, what)


def _plane_bytes(page):
    """Bytes of an uncompressed greyscale page: rows of fewer than 8 bits per pixel (1-bit
    bilevel masks) are packed, each row starting on a byte boundary (TIFF 6.0 specification,
    section 9: bilevel images).

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> _plane_bytes(SimpleNamespace(shape=(3, 10), bitspersample=1))
    6
    >>> _plane_bytes(SimpleNamespace(shape=(3, 10), bitspersample=16))
    60
    """
    rows, columns = page.shape
    return rows * math.ceil(columns * page.bitspersample / 8)


def read_checked_page(tif, z, path):
    """Page `z` of a TIFF opened by :func:`open_checked_tiff`, every complaint an error.

    Examples
    --------
    >>> import io
    >>> buf = io.BytesIO()
    >>> tifffile.imwrite(buf, np.arange(8, dtype=np.uint8).reshape(2, 2, 2),
    ...                  photometric="minisblack")
    >>> with tifffile.TiffFile(io.BytesIO(buf.getvalue())) as tif:
    ...     read_checked_page(tif, 1, "buffer").tolist()
    [[4, 5], [6, 7]]
    """
    try:
        with complaints_as_errors(path, what=f"reading page {z}"):
            return np.asarray(tif.pages[z].asarray())
    except TesseraInputError:
        raise
    except _READ_ERRORS as exc:
        raise TesseraInputError(
            f"cannot read page {z}: {type(exc).__name__}: {exc}; expected a page that decodes "
            "whole: the file is damaged (copy or export it again)",
            source=path,
        ) from None


def read_checked_tiff(path):
    """All pages of a greyscale TIFF as one (pages, y, x) array, checked whole first.

    For annotation volumes (labels, instances, region masks) read in one piece: the same
    checks as :func:`open_checked_tiff`, so a damaged file is refused in one line instead of
    raising what tifffile raises or returning fewer or altered pages.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> f = Path(tempfile.mkdtemp()) / "labels.tif"
    >>> tifffile.imwrite(f, np.arange(8, dtype=np.uint16).reshape(2, 2, 2))
    >>> read_checked_tiff(f)[1].tolist()
    [[4, 5], [6, 7]]
    """
    with contextlib.closing(open_checked_tiff(path)) as tif:
        first = tif.pages[0]
        out = np.empty((len(tif.pages), *first.shape), dtype=first.dtype)
        for z in range(len(out)):
            out[z] = read_checked_page(tif, z, path)
    return out
