"""Plain files people edit by hand: tab-separated sheets read as text, PNG and TIFF images read
as stored. Cells and pixels are data only; nothing in them is ever evaluated or unpickled."""

import numpy as np
import pandas as pd
import tifffile
from PIL import Image

from tessera.errors import TesseraInputError

__all__ = ["read_image", "read_text_table"]


def read_text_table(path):
    """A tab-separated file with a header line, every cell as text (blank cells as ``""``).

    Parameters
    ----------
    path : Path

    Returns
    -------
    pandas.DataFrame
        Columns as in the header, every value a str.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> f = Path(tempfile.mkdtemp()) / "sheet.tsv"
    >>> _ = f.write_text("z\\tnote\\n007\\t\\n")
    >>> read_text_table(f).to_dict("records")
    [{'z': '007', 'note': ''}]
    """
    if not path.is_file():
        raise TesseraInputError("file not found", source=path)
    try:
        return pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise TesseraInputError(f"not a readable tab-separated table: {exc}", source=path) from None


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
