"""PNG and TIFF images read as stored (painted masks, label tiles): pixels are data only; a file
is decoded by its image signature, never unpickled."""

import numpy as np
import tifffile
from PIL import Image

from tessera.errors import TesseraInputError

__all__ = ["read_image"]


def read_image(path):
    """Pixels of a PNG (via Pillow) or TIFF (via tifffile) without conversion.

    Palette PNGs are expanded to RGBA; everything else keeps its stored dtype and channels.
    A file that is neither is an error naming it.

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
    try:
        if suffix in (".tif", ".tiff"):
            return np.asarray(tifffile.imread(path))
        with Image.open(path) as im:
            if im.mode == "P":
                im = im.convert("RGBA")
            return np.asarray(im)
    except (OSError, ValueError, tifffile.TiffFileError) as exc:
        raise TesseraInputError(f"cannot read the image: {exc}", source=path) from None
