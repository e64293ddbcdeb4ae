"""Tab-separated sheets people edit by hand, read as text: cells are data only, never evaluated.

Kept apart from the image readers so that planning, which reads the points sheet, imports only
pandas.
"""

import pandas as pd

from tessera.errors import TesseraInputError

__all__ = ["read_text_table"]


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
        text = " ".join(str(exc).split())  # pandas ends its tokenizer messages with a newline
        raise TesseraInputError(
            f"not a readable tab-separated table: {text}", source=path
        ) from None
