"""The region-mask check, ``results/<dataset>/roi_check/regions.json``: its one writer and reader.

Rule check_roi writes it after reading a dataset's region mask (the sheet's ``roi_mask``) whole
and checking it against the stack (shape, integer labels >= 0, at least one region); rule
morphometry reads it and measures regions only from the mask checked. Because the check is a job
of its own, a mask damaged or replaced after a run stops there, and the dataset's earlier
morphometry tables stay (Snakemake clears a job's outputs when the job starts). It holds
``regions``: ``path``, ``shape``, ``dtype`` and ``region_ids`` (how many distinct labels > 0).
"""

from tessera.workflow.files.json_records import read_record, write_record

CHECK_FORMAT = 1


def write_roi_check(path, regions):
    """Write what was found in a region mask (a dict of plain values) as JSON (atomic)."""
    write_record(path, CHECK_FORMAT, {"regions": regions})


def read_roi_check(path):
    """The ``regions`` entry of a check written by :func:`write_roi_check`."""
    return read_record(path, CHECK_FORMAT, what="region mask check", rule="check_roi")["regions"]
