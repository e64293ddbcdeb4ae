"""Tab-separated sheets people edit by hand, read as text: cells are data only, never evaluated.

Kept apart from the image readers so that planning, which reads the points sheet, imports only
pandas.
"""

import pandas as pd

from tessera.errors import TesseraInputError

__all__ = ["OTHER_SEPARATORS", "other_separator", "read_text_table"]

# Separators spreadsheet programs write into "CSV" exports (common practice: comma, or
# semicolon where the comma is the decimal mark), and the spaces a text editor may put for tabs
OTHER_SEPARATORS = (",", ";", " ")


def other_separator(cell):
    """The first of :data:`OTHER_SEPARATORS` in `cell` (a header read as one column), or None.

    Examples
    --------
    >>> other_separator("dataset,target,z"), other_separator("dataset")
    (',', None)
    """
    return next((s for s in OTHER_SEPARATORS if s in cell.strip()), None)


def read_text_table(path):
    """A tab-separated file with a header line, every cell as text (blank cells as ``""``).

    Empty columns after the last named one (trailing tabs) are dropped; a header read as one
    column that another separator splits (:func:`other_separator`) is refused with a hint to
    save tab-separated text.

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
    >>> _ = f.write_text("z\\tnote\\t\\t\\n007\\tok\\t\\t\\n")  # trailing tabs
    >>> read_text_table(f).columns.tolist()
    ['z', 'note']
    """
    if not path.is_file():
        raise TesseraInputError("file not found", source=path)
    try:
        # a byte-order mark, as some spreadsheet programs write, is not part of the first name
        table = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        text = " ".join(str(exc).split())  # pandas ends its tokenizer messages with a newline
        raise TesseraInputError(
            f"not a readable tab-separated table: {text}", source=path
        ) from None
    table.columns = [str(c).strip() for c in table.columns]
    # empty columns after the last named one (trailing tabs, as spreadsheet exports leave them)
    while len(table.columns) and table.columns[-1].startswith("Unnamed:"):
        if (table.iloc[:, -1].str.strip() != "").any():
            break  # a filled cell without a column name: left for the caller to name
        table = table.iloc[:, :-1]
    separator = other_separator(table.columns[0]) if len(table.columns) == 1 else None
    if separator is not None:
        raise TesseraInputError(
            f"header: one column {table.columns[0]!r}; expected columns separated by tabs, "
            f"found them separated by {separator!r}: save the table as tab-separated text",
            source=path,
        )
    return table
