"""The shard plan, ``results/<dataset>/predicted/<target>/plan.json``: its one writer and reader.

Rule shard_plan writes it; predict_shard and stitch read it. It holds the block geometry of
:func:`tessera.predict.plan_shards` (``shape``, ``block``, ``halo``, ``align``, ``blocks``,
``jobs``), preceded by ``format`` and followed by what the shard jobs and the stitch need
(``target``, ``downsample``, ``output_sigma``, ``spacing``, ``factors``, ``dtype``, ``models``,
``section_stand_ins``: ``[z, stand-in]`` of each section QC excluded, read in its place).
The halo is derived once, when the plan is made; every later job reads it from here.
"""

import json
from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.io.atomic import write_text

PLAN_FORMAT = 1


def write_plan(path, plan):
    """Write `plan` (a dict of plain values) as JSON with its format number first (atomic)."""
    write_text(path, json.dumps({"format": PLAN_FORMAT, **plan}, indent=1) + "\n")


def read_plan(path):
    """Read a shard plan written by :func:`write_plan`, checking its format."""
    try:
        plan = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TesseraInputError(
            "shard plan not found (rule shard_plan writes it)", source=path
        ) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise TesseraInputError(f"shard plan is damaged: {exc}", source=path) from None
    if not isinstance(plan, dict) or plan.get("format") != PLAN_FORMAT:
        raise TesseraInputError(f"not a shard plan of format {PLAN_FORMAT}", source=path)
    return plan
