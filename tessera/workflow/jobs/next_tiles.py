"""Job of rule next_tiles: suggest the next tiles to annotate; write a points sheet and a preview."""

import logging

import pandas as pd

from tessera.io.atomic import atomic_path, write_table
from tessera.next_tiles import plot_suggestions, rank_tiles
from tessera.workflow.files.probability_map import StoredProbability, open_probability_map
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.tile_registry import read_annotation_set

_log = logging.getLogger(__name__)


def next_tiles_job(
    probabilities,
    annotations,
    qc_tables,
    out_points,
    out_preview,
    *,
    target,
    size,
    count,
    min_sections=2,
    held_out=(),
    guard_sections=0,
):
    """Suggest the next tiles to annotate for one target; write a points sheet and a preview.

    `probabilities` and `qc_tables` map dataset ids to the stitched probability maps and the QC
    tables. The sheet's coordinates are full-resolution voxels, as the tile export expects.
    Datasets of `held_out` (``split.test_datasets``) get no suggestion: a tile annotated there
    and merged into the points would be a test tile, and the test set is kept as it was drawn.
    Nor do sections nearer than `guard_sections` to a validation or test tile: the suggested
    points are marked to be trained on, and there they would be dropped as guard tiles.
    """
    registry, _ = read_annotation_set(annotations)
    volumes, factors, scales = {}, {}, {}
    held_out = set(held_out)
    probabilities = {d: p for d, p in probabilities.items() if d not in held_out}
    qc_tables = {d: p for d, p in qc_tables.items() if d not in held_out}
    for dataset, path in probabilities.items():
        _, info, fields = open_probability_map(path)
        volumes[dataset] = info["levels"][0]
        scales[dataset] = fields["scale"]
        factors[dataset] = (fields["z_factor"], fields["downsample"])
    scaled = {d: StoredProbability(v, scales[d]) for d, v in volumes.items()}
    excluded = {d: set(excluded_sections(qc_tables[d], factors[d][0])) for d in qc_tables}
    held = registry[registry["role"].isin(["validation", "test"])]
    for dataset, z in zip(held["dataset"], held["z"], strict=True):
        if dataset in excluded:
            reach = range(z - max(guard_sections, 1) + 1, z + max(guard_sections, 1))
            excluded[dataset].update(reach)
    if any(len(set(range(v.shape[0])) - excluded.get(d, set())) for d, v in volumes.items()):
        picks = rank_tiles(
            scaled, registry, size=size, count=count, excluded=excluded, min_sections=min_sections
        )
    else:  # every section is QC excluded or near a held-out tile: nothing to learn from
        _log.warning("no section is free for a suggestion (QC excluded or near held-out tiles)")
        picks = pd.DataFrame(columns=["dataset", "z", "y", "x", "score"])
    points = pd.DataFrame(
        {
            "dataset": picks["dataset"],
            "target": target,
            "z": [z * factors[d][0] for d, z in zip(picks["dataset"], picks["z"], strict=False)],
            "y": [y * factors[d][1] for d, y in zip(picks["dataset"], picks["y"], strict=False)],
            "x": [x * factors[d][1] for d, x in zip(picks["dataset"], picks["x"], strict=False)],
            "size": size,
            # painted where the model is unsure, to be learnt from: never a held-out tile
            "role": "train",
        }
    )
    # the sheet holds only the columns the tile export reads; the scores go to the log and preview
    write_table(out_points, points)
    with atomic_path(out_preview) as tmp:
        plot_suggestions(picks, scaled, tmp, size=size, target=target)
    return {"suggested": len(points), "mean_entropy_bits": picks["score"].round(4).tolist()}
