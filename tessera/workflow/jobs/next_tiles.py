"""Job of rule next_tiles: suggest the next tiles to annotate; write a points sheet and a preview."""

import pandas as pd

from tessera.io.atomic import atomic_path, write_table
from tessera.next_tiles import plot_suggestions, rank_tiles
from tessera.workflow.files.probability_map import StoredProbability, open_probability_map
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.tile_registry import read_annotation_set


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
):
    """Suggest the next tiles to annotate for one target; write a points sheet and a preview.

    `probabilities` and `qc_tables` map dataset ids to the stitched probability maps and the QC
    tables. The sheet's coordinates are full-resolution voxels, as the tile export expects.
    Datasets of `held_out` (``split.test_datasets``) get no suggestion: a tile annotated there
    and merged into the points would be a test tile, and the test set is kept as it was drawn.
    """
    registry, _ = read_annotation_set(annotations)
    volumes, factors, scales = {}, {}, {}
    probabilities = {d: p for d, p in probabilities.items() if d not in set(held_out)}
    qc_tables = {d: p for d, p in qc_tables.items() if d not in set(held_out)}
    for dataset, path in probabilities.items():
        _, info, fields = open_probability_map(path)
        volumes[dataset] = info["levels"][0]
        scales[dataset] = fields["scale"]
        factors[dataset] = (fields["z_factor"], fields["downsample"])
    scaled = {d: StoredProbability(v, scales[d]) for d, v in volumes.items()}
    excluded = {d: excluded_sections(qc_tables[d], factors[d][0]) for d in qc_tables}
    picks = rank_tiles(
        scaled, registry, size=size, count=count, excluded=excluded, min_sections=min_sections
    )
    points = pd.DataFrame(
        {
            "dataset": picks["dataset"],
            "target": target,
            "z": [z * factors[d][0] for d, z in zip(picks["dataset"], picks["z"], strict=False)],
            "y": [y * factors[d][1] for d, y in zip(picks["dataset"], picks["y"], strict=False)],
            "x": [x * factors[d][1] for d, x in zip(picks["dataset"], picks["x"], strict=False)],
            "size": size,
        }
    )
    # the sheet holds only the columns the tile export reads; the scores go to the log and preview
    write_table(out_points, points)
    with atomic_path(out_preview) as tmp:
        plot_suggestions(picks, scaled, tmp, size=size, target=target)
    return {"suggested": len(points), "mean_entropy_bits": picks["score"].round(4).tolist()}
