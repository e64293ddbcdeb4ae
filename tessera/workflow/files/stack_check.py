"""The stack check, ``results/<dataset>/ingest/stack_check.json``: its one writer and reader.

Rule check_stack writes it after opening the dataset's stack and checking it whole (format,
layout, voxel size); rule ingest reads it and converts the stack only if it is still the one
checked (same sections, plane shape and dtype). It holds ``format`` and the ``stack`` found:
``path``, ``format``, ``shape`` (sections present, rows, columns), ``dtype``, ``spacing`` (z y x
nm, resolved from the sheet and the header) and ``missing_sections`` (placeholders ingest will
write).
"""

import json
from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.io.atomic import write_text

CHECK_FORMAT = 1


def write_stack_check(path, stack):
    """Write what was found in a stack (a dict of plain values) as JSON (atomic)."""
    write_text(path, json.dumps({"format": CHECK_FORMAT, "stack": stack}, indent=1) + "\n")


def read_stack_check(path):
    """The ``stack`` entry of a check written by :func:`write_stack_check`."""
    try:
        check = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TesseraInputError(
            "stack check not found (rule check_stack writes it)", source=path
        ) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise TesseraInputError(f"stack check is damaged: {exc}", source=path) from None
    if not isinstance(check, dict) or check.get("format") != CHECK_FORMAT:
        raise TesseraInputError(f"not a stack check of format {CHECK_FORMAT}", source=path)
    return check["stack"]
