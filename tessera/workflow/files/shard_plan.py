"""The shard plan, ``results/<dataset>/predicted/<target>/plan.json``: its one writer and reader.

Rule shard_plan writes it; predict_shard and stitch read it. It holds the block geometry of
:func:`tessera.predict.plan_shards` (``shape``, ``block``, ``halo``, ``align``, ``blocks``,
``jobs``), preceded by ``format`` and followed by what the shard jobs and the stitch need
(``target``, ``downsample``, ``output_sigma``, ``spacing``, ``factors``, ``dtype``, ``models``,
``section_stand_ins``: ``[z, stand-in]`` of each section QC excluded, read in its place).
The halo is derived once, when the plan is made; every later job reads it from here.
"""

from tessera.workflow.files.json_records import read_record, write_record

PLAN_FORMAT = 1


def write_plan(path, plan):
    """Write `plan` (a dict of plain values) as JSON with its format number first (atomic)."""
    write_record(path, PLAN_FORMAT, plan)


def read_plan(path):
    """Read a shard plan written by :func:`write_plan`, checking its format."""
    return read_record(path, PLAN_FORMAT, what="shard plan", rule="shard_plan")
