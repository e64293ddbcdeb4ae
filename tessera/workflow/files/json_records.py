"""Small JSON records that carry a format number first: one way to write and read them.

The shard plan and the stack check are such records; each module names its file, its format
number and the rule that writes it, and this one owns how they are written (atomic) and how a
missing, damaged or foreign file is refused.
"""

import json
from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.io.atomic import write_text


def write_record(path, fmt, fields):
    """Write `fields` (a dict of plain values) as JSON after ``format`` = `fmt` (atomic)."""
    write_text(path, json.dumps({"format": fmt, **fields}, indent=1) + "\n")


def read_record(path, fmt, *, what, rule):
    """The record at `path`, refused in one line when missing, damaged or of another format.

    Examples
    --------
    >>> import tempfile
    >>> p = Path(tempfile.mkdtemp()) / "r.json"
    >>> write_record(p, 1, {"a": 2})
    >>> read_record(p, 1, what="test record", rule="r")
    {'format': 1, 'a': 2}
    >>> read_record(p, 2, what="test record", rule="r")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: .../r.json: not a test record of format 2
    """
    try:
        record = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TesseraInputError(f"{what} not found (rule {rule} writes it)", source=path) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise TesseraInputError(f"{what} is damaged: {exc}", source=path) from None
    if not isinstance(record, dict) or record.get("format") != fmt:
        raise TesseraInputError(f"not a {what} of format {fmt}", source=path)
    return record
