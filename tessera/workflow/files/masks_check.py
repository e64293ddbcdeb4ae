"""The painted-mask check, ``results/study/<target>/masks_check.json``: its one writer and reader.

Rule check_masks writes it after reading every painted mask of a target, of every dataset, and
checking it (a mask for every exported tile, of its tile's shape and values, on a section QC
kept); rule import_tiles reads it and registers only the masks checked. Because the check is a
job of its own, a mask painted wrongly after a run stops there, and every dataset's earlier
imported tiles stay (Snakemake clears a job's outputs when the job starts). It holds ``masks``:
tile id → ``dataset``, ``file`` (the mask's name) and ``sha256`` (of its bytes).
"""

from tessera.workflow.files.json_records import read_record, write_record

CHECK_FORMAT = 1


def write_masks_check(path, masks):
    """Write the masks found (tile id → dict of plain values) as JSON (atomic)."""
    write_record(path, CHECK_FORMAT, {"masks": masks})


def read_masks_check(path):
    """The ``masks`` entry of a check written by :func:`write_masks_check`."""
    return read_record(path, CHECK_FORMAT, what="mask check", rule="check_masks")["masks"]
