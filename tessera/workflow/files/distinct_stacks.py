"""The study's check that no two datasets hold one stack, ``results/study/distinct_stacks.json``:
its one writer and reader.

Rule check_distinct_stacks writes it after comparing the SHA-256 of every dataset's stack (from
the datasets' ``inputs.sha256``); rule statistics reads it and counts animals only over the
datasets checked. Because the check is a job of its own, a sheet that lists one stack twice
stops there, and the statistics of the run before stay (Snakemake clears a job's outputs when
the job starts). It holds ``stacks``: dataset id → the stack's SHA-256.
"""

from tessera.workflow.files.json_records import read_record, write_record

CHECK_FORMAT = 1


def write_distinct_stacks(path, stacks):
    """Write dataset id → SHA-256 of its stack (all distinct) as JSON (atomic).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "distinct_stacks.json"
    >>> write_distinct_stacks(path, {"ds_a": "ab12", "ds_b": "cd34"})
    >>> read_distinct_stacks(path)
    {'ds_a': 'ab12', 'ds_b': 'cd34'}
    """
    write_record(path, CHECK_FORMAT, {"stacks": dict(stacks)})


def read_distinct_stacks(path):
    """The ``stacks`` entry of a check written by :func:`write_distinct_stacks`."""
    record = read_record(
        path, CHECK_FORMAT, what="check of distinct stacks", rule="check_distinct_stacks"
    )
    return record["stacks"]
