"""PNG and TIFF images read as stored (painted masks, label tiles): pixels are data only; a file
is decoded by its image signature, never unpickled."""

import struct
import zlib

import numpy as np
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.tiff_checks import read_checked_tiff

__all__ = ["IMAGE_READ_ERRORS", "check_png_chunks", "read_image"]

#: What Pillow raises for a damaged image besides OSError and ValueError: SyntaxError for a
#: broken chunk, EOFError and struct.error for a file cut inside a header.
IMAGE_READ_ERRORS = (OSError, ValueError, SyntaxError, EOFError, struct.error)

_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def check_png_chunks(path):
    """Refuse a PNG whose chunks are cut short or fail their CRC-32.

    Pillow checks the CRC of the header chunks only; image data (IDAT) are decoded without it
    and the decoder stops once the image is full, before the zlib checksum, so a changed byte
    there would read as altered pixels. Each chunk is a 4-byte big-endian length, a 4-byte type,
    the data and a CRC-32 over type and data (PNG specification, sections 5.3 and 5.4).

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> f = Path(tempfile.mkdtemp()) / "t.png"
    >>> Image.fromarray(np.zeros((4, 4), np.uint8)).save(f)
    >>> data = bytearray(f.read_bytes())
    >>> data[-20] ^= 1  # inside the last IDAT chunk
    >>> _ = f.write_bytes(bytes(data))
    >>> check_png_chunks(f)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: ...t.png: PNG chunk IDAT at byte 33 fails its CRC-32 (damaged?)
    """
    data = path.read_bytes()
    pos = len(_PNG_SIGNATURE)
    while pos + 12 <= len(data):
        (length,) = struct.unpack(">I", data[pos : pos + 4])
        kind = data[pos + 4 : pos + 8]
        end = pos + 12 + length
        if end > len(data):
            break
        (crc,) = struct.unpack(">I", data[end - 4 : end])
        if zlib.crc32(data[pos + 4 : end - 4]) != crc:
            name = kind.decode("latin-1") if kind.isalpha() else repr(kind)
            raise TesseraInputError(
                f"PNG chunk {name} at byte {pos} fails its CRC-32 (damaged?)", source=path
            )
        if kind == b"IEND":
            return
        pos = end
    raise TesseraInputError(
        f"PNG chunks end at byte {pos} of {len(data)} without an IEND chunk (truncated?)",
        source=path,
    )


def read_image(path):
    """Pixels of a PNG (via Pillow) or greyscale TIFF (via tifffile) without conversion.

    Palette PNGs are expanded to RGBA; everything else keeps its stored dtype and channels.
    A TIFF must hold one greyscale page and is checked whole first
    (:func:`tessera.io.tiff_checks.read_checked_tiff`); a PNG's chunks must pass their CRC-32.
    A file that is neither, or is damaged, is an error naming it.

    Parameters
    ----------
    path : Path
        ``.tif`` / ``.tiff`` (any case) is read with tifffile, anything else with Pillow.

    Returns
    -------
    ndarray

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> f = Path(tempfile.mkdtemp()) / "t.png"
    >>> Image.fromarray(np.array([[0, 7]], dtype=np.uint8)).save(f)
    >>> read_image(f)
    array([[0, 7]], dtype=uint8)
    """
    suffix = path.suffix.lower()
    if suffix in (".tif", ".tiff"):
        pages = read_checked_tiff(path)
        if len(pages) != 1:
            raise TesseraInputError(
                f"expected one greyscale image, found {len(pages)} pages", source=path
            )
        return pages[0]
    try:
        with open(path, "rb") as fh:
            is_png = fh.read(len(_PNG_SIGNATURE)) == _PNG_SIGNATURE
        if is_png:
            check_png_chunks(path)
        with Image.open(path) as im:
            if im.mode == "P":
                im = im.convert("RGBA")
            return np.asarray(im)
    except IMAGE_READ_ERRORS as exc:
        if isinstance(exc, TesseraInputError):
            raise
        raise TesseraInputError(f"cannot read the image: {exc}", source=path) from None
