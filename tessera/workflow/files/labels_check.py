"""The label check, ``results/<dataset>/labels_check/<target>.json``: its one writer and reader.

Rule check_labels writes it after reading a target's label volume of one dataset whole and
checking it (shape of the image, integers >= 0, target and background both present); rule
sample_tiles reads it and cuts tiles only from the volume checked. Because the check is a job of
its own, a label volume damaged or replaced after a run stops there, and the dataset's earlier
tiles stay (Snakemake clears a job's outputs when the job starts). It holds ``labels``: ``path``,
``shape``, ``dtype`` and ``target_voxels``.
"""

from tessera.workflow.files.json_records import read_record, write_record

CHECK_FORMAT = 1


def write_labels_check(path, labels):
    """Write what was found in a label volume (a dict of plain values) as JSON (atomic)."""
    write_record(path, CHECK_FORMAT, {"labels": labels})


def read_labels_check(path):
    """The ``labels`` entry of a check written by :func:`write_labels_check`."""
    return read_record(path, CHECK_FORMAT, what="label check", rule="check_labels")["labels"]
