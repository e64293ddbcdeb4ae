"""The stack check, ``results/<dataset>/ingest/stack_check.json``: its one writer and reader.

Rule check_stack writes it after opening the dataset's stack and checking it whole (format,
layout, voxel size); rule ingest reads it and converts the stack only if it is still the one
checked (same sections, plane shape and dtype). It holds ``format`` and the ``stack`` found:
``path``, ``format``, ``shape`` (sections present, rows, columns), ``dtype``, ``spacing`` (z y x
nm, resolved from the sheet and the header) and ``missing_sections`` (placeholders ingest will
write).
"""

from tessera.workflow.files.json_records import read_record, write_record

CHECK_FORMAT = 1


def write_stack_check(path, stack):
    """Write what was found in a stack (a dict of plain values) as JSON (atomic)."""
    write_record(path, CHECK_FORMAT, {"stack": stack})


def read_stack_check(path):
    """The ``stack`` entry of a check written by :func:`write_stack_check`."""
    return read_record(path, CHECK_FORMAT, what="stack check", rule="check_stack")["stack"]
